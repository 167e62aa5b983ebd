"""Acquisition measures: one score per unlabelled candidate.

A *measure* turns what the model says about the pool (a :class:`PoolView`) into one
number per candidate; higher means "compute me sooner". Measures know nothing about
budgets or batches; that is the job of :mod:`prescreen.acquire.selectors`.

The module also holds :class:`PoolView` (what every measure, selector and strategy sees)
and the Poisson-binomial helpers used to put an interval on an expected number of hits.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy import stats

from prescreen.errors import InputError

__all__ = [
    "PoolView",
    "probability_score",
    "cost_efficiency_score",
    "ucb_score",
    "thompson_score",
    "spread_score",
    "novelty_score",
    "random_score",
    "standardise",
    "poisson_binomial_pmf",
    "expected_hits",
    "EXACT_POISSON_BINOMIAL_MAX",
    "DEFAULT_INTERVAL_LEVEL",
]

#: Largest number of Bernoulli terms for which the Poisson-binomial distribution is
#: computed exactly (O(n^2) convolution); above it a normal approximation is used.
#: Chosen so the exact path stays below ~0.1 s on one core (common practice).
EXACT_POISSON_BINOMIAL_MAX: int = 3000

#: Central probability of the intervals reported on expected hits (common practice).
DEFAULT_INTERVAL_LEVEL: float = 0.9


def _by_id(values, ids: np.ndarray):
    """A pandas Series/DataFrame indexed by candidate id, put in the order of ``ids``.

    Anything else, and pandas objects with a plain 0..n-1 index, are taken by position.
    """
    import pandas as pd

    index = getattr(values, "index", None)
    if not isinstance(values, (pd.Series, pd.DataFrame)) or isinstance(index, pd.RangeIndex):
        return values
    keys = [str(k) for k in index]
    if sorted(keys) != sorted(str(i) for i in ids):
        missing = sorted(set(map(str, ids)) - set(keys))
        raise InputError("the index of a pool column does not match the candidate ids",
                         value=missing[:3] or keys[:3],
                         expected="the same ids as the pool, or a plain 0..n-1 index")
    out = values.copy()
    out.index = keys
    return out.loc[[str(i) for i in ids]]


def _as_1d(name: str, values, n: int | None) -> np.ndarray:
    arr = np.asarray(values, dtype=float)
    if arr.ndim != 1:
        raise InputError(f"{name} must be one-dimensional", value=arr.shape, expected="shape (n,)")
    if n is not None and arr.shape[0] != n:
        raise InputError(
            f"{name} has the wrong length", value=arr.shape[0], expected=f"{n} entries, one per id"
        )
    bad = np.flatnonzero(~np.isfinite(arr))
    if bad.size:
        raise InputError(f"{name} is not finite", line=int(bad[0]), value=arr[bad[0]],
                         expected="a finite number")
    return arr


@dataclass(frozen=True, eq=False)
class PoolView:
    """What a strategy sees of the unlabelled pool; every array has one row per candidate.

    Build it with :meth:`PoolView.build`, which checks the inputs and removes pending or
    excluded ids.

    Attributes
    ----------
    ids : ndarray of str, shape (n,)
        Candidate identifiers, unique.
    X : ndarray of float, shape (n, d)
        Features used for batch diversity (any units; standardised inside the selectors;
        NaN allowed and treated as the column mean).
    mean : ndarray of float, shape (n,)
        Calibrated probability that the candidate is a hit (spillage >= threshold, and a
        band gap with SOC when the model was trained to require one).
    std : ndarray of float, shape (n,)
        Spread of that probability (e.g. the standard deviation over ensemble members).
    cost : ndarray of float, shape (n,)
        Predicted cost of one spillage evaluation, core-hours, > 0.
    members : ndarray of float, shape (n_models, n), optional
        Probabilities from each ensemble member, for Thompson sampling.
    cost_low, cost_high : ndarray of float, shape (n,), optional
        Interval on the predicted cost, core-hours.
    X_labelled : ndarray of float, shape (m, d), optional
        Features of the candidates already labelled, for distance-based exploration.
    """

    ids: np.ndarray
    X: np.ndarray
    mean: np.ndarray
    std: np.ndarray
    cost: np.ndarray
    members: np.ndarray | None = None
    cost_low: np.ndarray | None = None
    cost_high: np.ndarray | None = None
    X_labelled: np.ndarray | None = None

    def __len__(self) -> int:
        return int(self.ids.shape[0])

    @classmethod
    def build(
        cls,
        ids: Sequence[str],
        X,
        mean,
        std,
        cost,
        *,
        members=None,
        cost_low=None,
        cost_high=None,
        X_labelled=None,
        exclude: Sequence[str] | None = None,
    ) -> "PoolView":
        """Check the arrays and drop the ids in ``exclude`` (pending or already labelled).

        Parameters
        ----------
        ids : sequence of str, length n
        X : array_like, shape (n, d)
        mean, std, cost : array_like, shape (n,)
            Probability in [0, 1], its spread (>= 0) and predicted core-hours (> 0).
        members : array_like, shape (n_models, n), optional
        cost_low, cost_high : array_like, shape (n,), optional
        X_labelled : array_like, shape (m, d), optional
        exclude : sequence of str, optional
            Ids to leave out; ids not in the pool are ignored (they may be labelled ones).

        Raises
        ------
        InputError
            On a wrong shape, a duplicate id, a non-finite value, a probability outside
            [0, 1], a negative spread or a non-positive cost; the entry is named.
        """
        id_arr = np.asarray([str(i) for i in ids], dtype=object)
        n = id_arr.shape[0]
        uniq, counts = np.unique(id_arr.astype(str), return_counts=True)
        if np.any(counts > 1):
            raise InputError("duplicate candidate id in the pool", line=str(uniq[counts > 1][0]),
                             value=str(uniq[counts > 1][0]), expected="unique ids")

        def aligned(value):
            return _by_id(value, id_arr)

        X_arr = np.asarray(aligned(X), dtype=float)
        if X_arr.ndim != 2 or X_arr.shape[0] != n:
            raise InputError("X has the wrong shape", value=X_arr.shape,
                             expected=f"shape ({n}, d)")
        mean_arr = _as_1d("mean", aligned(mean), n)
        std_arr = _as_1d("std", aligned(std), n)
        cost_arr = _as_1d("cost", aligned(cost), n)
        checks = (
            ("mean", mean_arr, (mean_arr < 0) | (mean_arr > 1), "a probability in [0, 1]"),
            ("std", std_arr, std_arr < 0, "a spread >= 0"),
            ("cost", cost_arr, cost_arr <= 0, "a predicted cost > 0 core-hours"),
        )
        for name, arr, bad_mask, expected in checks:
            bad = np.flatnonzero(bad_mask)
            if bad.size:
                raise InputError(f"{name} out of range for candidate", line=str(id_arr[bad[0]]),
                                 value=float(arr[bad[0]]), expected=expected)
        mem = None
        if members is not None:
            mem = np.asarray(members, dtype=float)
            if mem.ndim != 2 or mem.shape[1] != n:
                raise InputError("members has the wrong shape", value=mem.shape,
                                 expected=f"shape (n_models, {n})")
            if not np.all(np.isfinite(mem)) or np.any((mem < 0) | (mem > 1)):
                raise InputError("members must hold probabilities in [0, 1]",
                                 expected="finite values in [0, 1]")
        low = None if cost_low is None else _as_1d("cost_low", aligned(cost_low), n)
        high = None if cost_high is None else _as_1d("cost_high", aligned(cost_high), n)
        lab = None
        if X_labelled is not None:
            lab = np.asarray(X_labelled, dtype=float)
            if lab.ndim != 2 or lab.shape[1] != X_arr.shape[1]:
                raise InputError("X_labelled has the wrong shape", value=lab.shape,
                                 expected=f"shape (m, {X_arr.shape[1]})")
        keep = np.ones(n, dtype=bool)
        if exclude is not None:
            keep = ~np.isin(id_arr.astype(str), np.asarray([str(e) for e in exclude], dtype=str))

        def cut(a):
            return None if a is None else a[keep]

        return cls(
            ids=id_arr[keep], X=X_arr[keep], mean=mean_arr[keep], std=std_arr[keep],
            cost=cost_arr[keep], members=None if mem is None else mem[:, keep],
            cost_low=cut(low), cost_high=cut(high), X_labelled=lab,
        )


# --------------------------------------------------------------------------- measures
def probability_score(view: PoolView) -> np.ndarray:
    """Probability of a hit, shape (n,). Exploitation."""
    return view.mean.copy()


def cost_efficiency_score(view: PoolView) -> np.ndarray:
    """Expected hits per core-hour, ``mean / cost``, shape (n,), unit 1/core-hour."""
    return view.mean / view.cost


def ucb_score(view: PoolView, kappa: float = 1.0) -> np.ndarray:
    """Upper confidence bound ``mean + kappa * std``, shape (n,).

    Parameters
    ----------
    kappa
        Weight of the spread, >= 0 (0 is greedy probability).
    """
    if not np.isfinite(kappa) or kappa < 0:
        raise InputError("kappa must be a finite number >= 0", value=kappa, expected=">= 0")
    return view.mean + kappa * view.std


def thompson_score(view: PoolView, rng: np.random.Generator) -> np.ndarray:
    """One posterior draw per candidate, shape (n,).

    With ensemble members, each candidate takes the probability of one member drawn
    uniformly (independently per candidate). Without members the draw is
    ``mean + std * z`` with ``z ~ N(0, 1)``, clipped to [0, 1].
    """
    n = len(view)
    if view.members is not None and view.members.shape[0] > 0:
        pick = rng.integers(0, view.members.shape[0], size=n)
        return view.members[pick, np.arange(n)].astype(float)
    return np.clip(view.mean + view.std * rng.standard_normal(n), 0.0, 1.0)


def spread_score(view: PoolView) -> np.ndarray:
    """Model spread (std), shape (n,). Pure exploration."""
    return view.std.copy()


def standardise(X: np.ndarray, reference: np.ndarray | None = None) -> np.ndarray:
    """Scale columns to zero mean and unit variance; NaN becomes 0 (the column mean).

    Parameters
    ----------
    X : ndarray, shape (n, d)
    reference : ndarray, shape (m, d), optional
        Rows whose statistics define the scaling (default: ``X`` itself).

    Returns
    -------
    ndarray, shape (n, d)
        Constant columns become 0.
    """
    ref = np.asarray(X if reference is None else reference, dtype=float)
    centre = _nanmean(ref)
    scale = _nanstd(ref, centre)
    scale = np.where(scale > 0, scale, 1.0)
    Z = (X - centre) / scale
    return np.where(np.isnan(Z), 0.0, Z)


def _nanmean(A: np.ndarray) -> np.ndarray:
    counts = np.sum(~np.isnan(A), axis=0)
    sums = np.nansum(A, axis=0)
    return np.where(counts > 0, sums / np.maximum(counts, 1), 0.0)


def _nanstd(A: np.ndarray, centre: np.ndarray) -> np.ndarray:
    counts = np.sum(~np.isnan(A), axis=0)
    sq = np.nansum((A - centre) ** 2, axis=0)
    return np.sqrt(np.where(counts > 0, sq / np.maximum(counts, 1), 0.0))


def novelty_score(view: PoolView) -> np.ndarray:
    """Distance to the nearest labelled candidate in standardised feature space, shape (n,).

    Raises
    ------
    InputError
        If the view carries no ``X_labelled`` (nothing to measure distance from).
    """
    if view.X_labelled is None or view.X_labelled.shape[0] == 0:
        raise InputError("distance-based exploration needs the features of labelled candidates",
                         expected="PoolView.build(..., X_labelled=...) with at least one row")
    both = np.vstack([view.X, view.X_labelled])
    Z = standardise(both)
    pool, lab = Z[: len(view)], Z[len(view):]
    best = np.full(len(view), np.inf)
    for row in lab:  # O(n m d) with O(n d) memory
        best = np.minimum(best, np.sqrt(np.sum((pool - row) ** 2, axis=1)))
    return best


def random_score(view: PoolView, rng: np.random.Generator) -> np.ndarray:
    """Uniform random scores, shape (n,)."""
    return rng.random(len(view))


# ----------------------------------------------------------------- expected hits
def poisson_binomial_pmf(p) -> np.ndarray:
    """Exact distribution of the number of successes of independent Bernoulli trials.

    Parameters
    ----------
    p : array_like, shape (n,)
        Success probabilities.

    Returns
    -------
    ndarray, shape (n + 1,)
        ``pmf[k] = P(K = k)``, by direct convolution (O(n^2)).
    """
    probs = np.asarray(p, dtype=float)
    pmf = np.zeros(probs.shape[0] + 1)
    pmf[0] = 1.0
    for i, pi in enumerate(probs):
        pmf[1: i + 2] = pmf[1: i + 2] * (1 - pi) + pmf[: i + 1] * pi
        pmf[0] *= 1 - pi
    return pmf


def expected_hits(p, level: float = DEFAULT_INTERVAL_LEVEL) -> tuple[float, float, float, str]:
    """Expected number of hits among independent candidates, with a central interval.

    Parameters
    ----------
    p : array_like, shape (n,)
        Calibrated hit probabilities.
    level
        Central probability of the interval, in (0, 1).

    Returns
    -------
    mean, low, high, method
        ``mean = sum(p)``; ``low``/``high`` the equal-tailed quantiles of the exact
        Poisson-binomial distribution (``method="exact Poisson-binomial"``) when
        ``n <= EXACT_POISSON_BINOMIAL_MAX``, else a normal approximation with variance
        ``sum p(1-p)``, clipped to [0, n] (``method="normal approximation"``).
    """
    if not 0 < level < 1:
        raise InputError("interval level must be in (0, 1)", value=level, expected="0 < level < 1")
    probs = np.asarray(p, dtype=float)
    mean = float(probs.sum())
    tail = (1 - level) / 2
    if probs.shape[0] <= EXACT_POISSON_BINOMIAL_MAX:
        cdf = np.cumsum(poisson_binomial_pmf(probs))
        low = float(np.searchsorted(cdf, tail - 1e-12))
        high = float(np.searchsorted(cdf, 1 - tail - 1e-12))
        return mean, low, min(high, float(probs.shape[0])), "exact Poisson-binomial"
    sd = float(np.sqrt(np.sum(probs * (1 - probs))))
    z = float(stats.norm.ppf(1 - tail))
    return (mean, max(0.0, mean - z * sd), min(float(probs.shape[0]), mean + z * sd),
            "normal approximation")
