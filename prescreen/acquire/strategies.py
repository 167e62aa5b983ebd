"""Acquisition strategies: a measure joined to a selector, all with one signature.

A strategy is a plain function ``strategy(view, budget, rng) -> Proposal``
(:data:`Strategy`); options are keyword-only and bound with :func:`functools.partial`,
e.g. ``partial(upper_confidence_bound, kappa=2.0, diversity=0.3)``. No registry is
needed. :func:`two_phase` returns a :class:`TwoPhase` schedule that hands out one
strategy per round (explore first, then exploit).

Diversity: ``diversity`` in [0, 1] is the weight of the distance term of
:func:`~prescreen.acquire.selectors.diverse_within_budget` (0: plain score order);
``clusters=k`` uses :func:`~prescreen.acquire.selectors.clustered_within_budget` instead.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd

from prescreen.acquire import measures as M
from prescreen.acquire import selectors as S
from prescreen.acquire.measures import PoolView
from prescreen.errors import InputError

__all__ = [
    "Proposal",
    "Strategy",
    "greedy_probability",
    "expected_hits_per_core_hour",
    "upper_confidence_bound",
    "thompson_sampling",
    "explore_spread",
    "explore_distance",
    "random_selection",
    "TwoPhase",
    "two_phase",
]


@dataclass(frozen=True, eq=False)
class Proposal:
    """A batch proposed for computation, with the reason for each pick.

    Attributes
    ----------
    ids : ndarray of str, shape (k,)
        Picked candidates, in pick order.
    scores : ndarray of float, shape (k,)
        Their acquisition scores (the measure's units).
    probability, spread, cost : ndarray of float, shape (k,)
        Hit probability, its spread, predicted core-hours.
    reasons : tuple of str, length k
        One short line each, e.g. ``"p=0.81 (spread 0.07), 3.2 core-h, ..."``.
    total_cost : float
        Sum of predicted cost, core-hours (never above ``budget``).
    budget : float
        Core-hours the batch was allowed.
    expected_hits : float
        Sum of hit probabilities.
    expected_hits_low, expected_hits_high : float
        Central interval on the number of hits at ``interval_level``.
    interval_level : float
    interval_method : str
        ``"exact Poisson-binomial"`` or ``"normal approximation"``.
    strategy : str
        Name of the strategy that made it.
    """

    ids: np.ndarray
    scores: np.ndarray
    probability: np.ndarray
    spread: np.ndarray
    cost: np.ndarray
    reasons: tuple[str, ...]
    total_cost: float
    budget: float
    expected_hits: float
    expected_hits_low: float
    expected_hits_high: float
    interval_level: float
    interval_method: str
    strategy: str

    def __len__(self) -> int:
        return int(self.ids.shape[0])

    def to_frame(self) -> pd.DataFrame:
        """One row per pick: id, rank, score, probability, spread, cost_core_hours, reason."""
        return pd.DataFrame({
            "id": self.ids.astype(str),
            "rank": np.arange(1, len(self) + 1),
            "score": self.scores,
            "probability": self.probability,
            "spread": self.spread,
            "cost_core_hours": self.cost,
            "reason": list(self.reasons),
        })


#: The one signature every strategy has: (pool, budget in core-hours, generator) -> Proposal.
Strategy = Callable[[PoolView, float, np.random.Generator], Proposal]


def _propose(view: PoolView, scores: np.ndarray, selection: S.Selection, name: str,
             budget: float, lead: str | None = None) -> Proposal:
    idx = selection.indices
    reasons = []
    for i, note in zip(idx, selection.notes):
        cost = f"{view.cost[i]:.2g} core-h"
        if view.cost_low is not None and view.cost_high is not None:
            cost = (f"{view.cost[i]:.2g} core-h (interval {view.cost_low[i]:.2g}-"
                    f"{view.cost_high[i]:.2g})")
        parts = [f"p={view.mean[i]:.2f} (spread {view.std[i]:.2f})", cost]
        if lead:
            parts.append(lead.format(score=scores[i]))
        parts.append(note)
        reasons.append(", ".join(parts))
    mean, low, high, method = M.expected_hits(view.mean[idx])
    return Proposal(
        ids=view.ids[idx], scores=scores[idx], probability=view.mean[idx],
        spread=view.std[idx], cost=view.cost[idx], reasons=tuple(reasons),
        total_cost=float(view.cost[idx].sum()), budget=float(budget),
        expected_hits=mean, expected_hits_low=low, expected_hits_high=high,
        interval_level=M.DEFAULT_INTERVAL_LEVEL, interval_method=method, strategy=name,
    )


def check_diversity(value: float) -> float:
    """``value`` as a float if it is a diversity weight in [0, 1], else InputError."""
    if not 0.0 <= float(value) <= 1.0:  # also refuses NaN
        raise InputError("bad diversity", value=value,
                         expected="a weight in [0, 1], e.g. 0.3 (0 = none)")
    return float(value)


def _pick(view: PoolView, scores: np.ndarray, budget: float, rng: np.random.Generator,
          name: str, *, diversity: float = 0.0, clusters: int | None = None,
          knapsack: bool = False, lead: str | None = None) -> Proposal:
    """Choose the selector for the options, run it, and build the proposal."""
    diversity = check_diversity(diversity)
    if clusters is not None:
        sel = S.clustered_within_budget(scores, view.X, view.cost, budget,
                                        n_clusters=clusters, rng=rng)
    elif diversity > 0:
        sel = S.diverse_within_budget(scores, view.X, view.cost, budget, trade_off=diversity,
                                      X_labelled=view.X_labelled)
    elif knapsack:
        sel = S.knapsack_greedy(view.mean, view.cost, budget)
    else:
        sel = S.top_within_budget(scores, view.cost, budget)
    return _propose(view, scores, sel, name, budget, lead)


def greedy_probability(view: PoolView, budget: float, rng: np.random.Generator, *,
                       diversity: float = 0.0, clusters: int | None = None) -> Proposal:
    """Most probable hits first (exploitation)."""
    scores = M.probability_score(view)
    return _pick(view, scores, budget, rng, "greedy_probability", diversity=diversity,
                 clusters=clusters)


def expected_hits_per_core_hour(view: PoolView, budget: float, rng: np.random.Generator, *,
                                diversity: float = 0.0, clusters: int | None = None) -> Proposal:
    """Maximise expected hits within the budget: a 0/1 knapsack on hit probability.

    Without diversity this is :func:`~prescreen.acquire.selectors.knapsack_greedy` on
    ``mean`` with cost; with diversity the score ``mean / cost`` feeds the diverse selector.
    """
    scores = M.cost_efficiency_score(view)
    return _pick(view, scores, budget, rng, "expected_hits_per_core_hour", diversity=diversity,
                 clusters=clusters, knapsack=True, lead="{score:.3f} hits/core-h")


def upper_confidence_bound(view: PoolView, budget: float, rng: np.random.Generator, *,
                           kappa: float = 1.0, diversity: float = 0.0,
                           clusters: int | None = None) -> Proposal:
    """Optimism under uncertainty: ``mean + kappa * std``."""
    scores = M.ucb_score(view, kappa)
    return _pick(view, scores, budget, rng, f"upper_confidence_bound(kappa={kappa:g})",
                 diversity=diversity, clusters=clusters, lead="UCB {score:.2f}")


def thompson_sampling(view: PoolView, budget: float, rng: np.random.Generator, *,
                      diversity: float = 0.0, clusters: int | None = None) -> Proposal:
    """Rank by one draw from the ensemble (see :func:`~prescreen.acquire.measures.thompson_score`)."""
    scores = M.thompson_score(view, rng)
    return _pick(view, scores, budget, rng, "thompson_sampling", diversity=diversity,
                 clusters=clusters, lead="draw {score:.2f}")


def explore_spread(view: PoolView, budget: float, rng: np.random.Generator, *,
                   diversity: float = 0.0, clusters: int | None = None) -> Proposal:
    """Pure exploration: largest model spread first."""
    scores = M.spread_score(view)
    return _pick(view, scores, budget, rng, "explore_spread", diversity=diversity,
                 clusters=clusters)


def explore_distance(view: PoolView, budget: float, rng: np.random.Generator, *,
                     diversity: float = 0.5) -> Proposal:
    """Pure exploration: farthest from the labelled set, greedy max-min within the batch."""
    scores = M.novelty_score(view)
    return _pick(view, scores, budget, rng, "explore_distance", diversity=diversity,
                 lead="distance {score:.2f}")


def random_selection(view: PoolView, budget: float, rng: np.random.Generator) -> Proposal:
    """Uniformly random order, first fit within the budget (the reference)."""
    scores = M.random_score(view, rng)
    return _pick(view, scores, budget, rng, "random_selection")


@dataclass(frozen=True)
class TwoPhase:
    """Explore during the first rounds (or budget fraction), exploit afterwards.

    Attributes
    ----------
    explore, exploit : Strategy
    explore_rounds : int
        Rounds 0 .. explore_rounds-1 explore.
    explore_core_hours : float or None
        If set, also explore while fewer than this many core-hours have been spent.
    """

    explore: Strategy
    exploit: Strategy
    explore_rounds: int = 1
    explore_core_hours: float | None = None

    def for_round(self, round_index: int, spent_core_hours: float = 0.0) -> Strategy:
        """The strategy to use in round ``round_index`` (0-based) after ``spent`` core-hours."""
        if round_index < self.explore_rounds:
            return self.explore
        if self.explore_core_hours is not None and spent_core_hours < self.explore_core_hours:
            return self.explore
        return self.exploit


def two_phase(explore: Strategy = explore_spread, exploit: Strategy = greedy_probability, *,
              explore_rounds: int = 1, explore_fraction: float | None = None,
              total_budget: float | None = None) -> TwoPhase:
    """Make a schedule: ``schedule.for_round(r, spent)`` returns the strategy for round r.

    Parameters
    ----------
    explore, exploit : Strategy
    explore_rounds
        Number of leading rounds that explore (>= 0).
    explore_fraction, total_budget
        Optionally explore until ``explore_fraction * total_budget`` core-hours are spent.
    """
    if int(explore_rounds) < 0:
        raise InputError("explore_rounds must be >= 0", value=explore_rounds, expected=">= 0")
    hours = None
    if explore_fraction is not None:
        if not 0 <= explore_fraction <= 1 or total_budget is None or total_budget <= 0:
            raise InputError("explore_fraction needs a value in [0, 1] and a total_budget > 0",
                             value=(explore_fraction, total_budget),
                             expected="0 <= explore_fraction <= 1 and total_budget > 0")
        hours = float(explore_fraction) * float(total_budget)
    return TwoPhase(explore, exploit, int(explore_rounds), hours)
