"""Stop rule: how many hits are probably left, and what the next one will cost.

Both numbers assume the calibrated probabilities are right and the candidates are
independent. The expected core-hours to the next hit assume candidates are computed one
at a time in descending ``p / cost`` - the order that minimises the expected cost of the
first success in a sequential search with independent successes (a classical result of
optimal search theory; from memory) - and are exact under those assumptions:

    E[cost to first hit] = sum_i cost_i * prod_{j < i} (1 - p_j)

counting the whole pool's cost in the event that no hit is left.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from prescreen.acquire.measures import DEFAULT_INTERVAL_LEVEL, expected_hits
from prescreen.errors import InputError

__all__ = ["StopEstimate", "stop_estimate", "expected_cost_to_first_hit"]


@dataclass(frozen=True)
class StopEstimate:
    """What is left in the unlabelled pool.

    Attributes
    ----------
    n_pool : int
        Unlabelled candidates considered.
    expected_hits_left : float
        Sum of calibrated hit probabilities.
    hits_left_low, hits_left_high : float
        Central interval on the number of hits left, at ``interval_level``.
    interval_level : float
    interval_method : str
        ``"exact Poisson-binomial"`` or ``"normal approximation"``.
    probability_any_hit : float
        ``1 - prod(1 - p)``.
    core_hours_to_next_hit : float
        Expected core-hours until the next hit (see the module docstring).
    pool_core_hours : float
        Predicted core-hours to compute the whole pool.
    advice : str
        One line: continue or stop, and why.
    """

    n_pool: int
    expected_hits_left: float
    hits_left_low: float
    hits_left_high: float
    interval_level: float
    interval_method: str
    probability_any_hit: float
    core_hours_to_next_hit: float
    pool_core_hours: float
    advice: str


def _check(p, cost) -> tuple[np.ndarray, np.ndarray]:
    pa = np.asarray(p, dtype=float)
    ca = np.asarray(cost, dtype=float)
    if pa.ndim != 1 or ca.shape != pa.shape:
        raise InputError("p and cost must be 1-D arrays of the same length",
                         value=(pa.shape, ca.shape), expected="two arrays of shape (n,)")
    bad = np.flatnonzero(~np.isfinite(pa) | (pa < 0) | (pa > 1))
    if bad.size:
        raise InputError("hit probability out of range", line=int(bad[0]), value=float(pa[bad[0]]),
                         expected="a probability in [0, 1]")
    bad = np.flatnonzero(~np.isfinite(ca) | (ca <= 0))
    if bad.size:
        raise InputError("predicted cost must be > 0 core-hours", line=int(bad[0]),
                         value=float(ca[bad[0]]), expected="a finite cost > 0")
    return pa, ca


def expected_cost_to_first_hit(p, cost, order=None) -> float:
    """Expected core-hours until the first hit when computing in ``order``.

    Parameters
    ----------
    p, cost : array_like, shape (n,)
        Hit probability and predicted core-hours.
    order : array_like of int, shape (n,), optional
        Computation order; default descending ``p / cost`` (ties by position).

    Returns
    -------
    float
        ``sum_i cost_i prod_{j<i} (1 - p_j)``; 0 for an empty pool.
    """
    pa, ca = _check(p, cost)
    if order is None:
        order = np.argsort(-(pa / ca), kind="stable")
    order = np.asarray(order, dtype=int)
    survive = np.concatenate([[1.0], np.cumprod(1 - pa[order])[:-1]]) if order.size else order
    return float(np.sum(ca[order] * survive))


def stop_estimate(p, cost, *, max_core_hours_per_hit: float | None = None,
                  level: float = DEFAULT_INTERVAL_LEVEL) -> StopEstimate:
    """Expected hits left (with an interval) and expected core-hours to the next one.

    Parameters
    ----------
    p, cost : array_like, shape (n,)
        Calibrated hit probability and predicted core-hours of every unlabelled candidate.
    max_core_hours_per_hit
        What a hit is worth to the user; the advice says "stop" when the next hit is
        expected to cost more than this, or when fewer than one hit is expected at the
        upper end of the interval.
    level
        Central probability of the interval.
    """
    pa, ca = _check(p, cost)
    mean, low, high, method = expected_hits(pa, level)
    any_hit = float(1 - np.prod(1 - pa)) if pa.size else 0.0
    to_next = expected_cost_to_first_hit(pa, ca)
    if pa.size == 0:
        advice = "stop: the pool is empty"
    elif high < 1:
        advice = f"stop: fewer than one hit expected even at the upper {level:.0%} bound"
    elif max_core_hours_per_hit is not None and to_next > max_core_hours_per_hit:
        advice = (f"stop: the next hit is expected to cost {to_next:.3g} core-h, more than "
                  f"{max_core_hours_per_hit:.3g}")
    else:
        advice = f"continue: {mean:.1f} hits expected left ({low:.0f}-{high:.0f})"
    return StopEstimate(
        n_pool=int(pa.size), expected_hits_left=mean, hits_left_low=low, hits_left_high=high,
        interval_level=level, interval_method=method, probability_any_hit=any_hit,
        core_hours_to_next_hit=to_next, pool_core_hours=float(ca.sum()), advice=advice,
    )
