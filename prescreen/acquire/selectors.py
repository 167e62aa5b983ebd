"""Selectors: pick a batch of candidates from their scores under a core-hour budget.

Every selector takes scores (higher is better) and predicted costs (core-hours) and
returns a :class:`Selection` whose total cost never exceeds the budget. Equal scores go
to the cheaper candidate (the same value for less of the budget), then by position in the
pool, so a selector is deterministic for given input.

- :func:`top_within_budget` - walk down the scores, take what still fits.
- :func:`knapsack_greedy` - 0/1 knapsack maximising the summed score: greedy by
  score/cost ratio, or the best single item if that is better (the classic
  1/2-approximation; Korte & Vygen, *Combinatorial Optimization*, ch. 17 - from memory).
- :func:`knapsack_exact` - exact 0/1 knapsack by a Pareto-frontier dynamic programme,
  for small pools and for testing the greedy one.
- :func:`diverse_within_budget` - greedy max-min distance with a score trade-off, so a
  batch is not many copies of one chemistry.
- :func:`clustered_within_budget` - k-means in feature space, then the best item of
  each cluster in turn.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from prescreen.acquire.measures import standardise
from prescreen.errors import InputError

__all__ = [
    "Selection",
    "top_within_budget",
    "knapsack_greedy",
    "knapsack_exact",
    "diverse_within_budget",
    "clustered_within_budget",
    "KNAPSACK_EXACT_MAX_STATES",
]

#: Largest Pareto frontier :func:`knapsack_exact` keeps before giving up (memory guard).
KNAPSACK_EXACT_MAX_STATES: int = 200_000


@dataclass(frozen=True, eq=False)
class Selection:
    """Positions picked by a selector, in pick order.

    Attributes
    ----------
    indices : ndarray of int, shape (k,)
        Positions in the pool, in the order they were picked.
    notes : tuple of str, length k
        One short human phrase per pick saying why (e.g. ``"2nd most distant from batch"``).
    """

    indices: np.ndarray
    notes: tuple[str, ...]


def _ordinal(k: int) -> str:
    suffix = "th" if 10 <= k % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(k % 10, "th")
    return f"{k}{suffix}"


def _check(scores, cost, budget) -> tuple[np.ndarray, np.ndarray, float]:
    s = np.asarray(scores, dtype=float)
    c = np.asarray(cost, dtype=float)
    if s.ndim != 1 or c.shape != s.shape:
        raise InputError("scores and cost must be 1-D arrays of the same length",
                         value=(s.shape, c.shape), expected="two arrays of shape (n,)")
    if not np.all(np.isfinite(s)):
        raise InputError("scores must be finite", line=int(np.flatnonzero(~np.isfinite(s))[0]),
                         expected="finite numbers")
    bad = np.flatnonzero(~np.isfinite(c) | (c <= 0))
    if bad.size:
        raise InputError("predicted cost must be > 0 core-hours", line=int(bad[0]),
                         value=float(c[bad[0]]), expected="a finite cost > 0")
    if not np.isfinite(budget) or budget < 0:
        raise InputError("budget must be a finite number of core-hours >= 0", value=budget,
                         expected=">= 0 core-hours")
    return s, c, float(budget)


def _descending(values: np.ndarray, cost: np.ndarray | None = None) -> np.ndarray:
    """Indices sorting ``values`` high to low; ties go to the cheaper candidate (with
    ``cost``: the same value for less of the budget), then keep pool order."""
    if cost is None:
        return np.argsort(-values, kind="stable")
    return np.lexsort((np.arange(values.shape[0]), cost, -values))


def _first_fit(order: np.ndarray, cost: np.ndarray, budget: float) -> list[int]:
    picked: list[int] = []
    left = budget
    for i in order:
        if cost[i] <= left:
            picked.append(int(i))
            left -= cost[i]
    return picked


def top_within_budget(scores, cost, budget: float) -> Selection:
    """Take candidates in descending score while they fit the remaining budget.

    Equal scores go cheapest first.

    Parameters
    ----------
    scores, cost : array_like, shape (n,)
        Scores (higher first) and predicted cost, core-hours.
    budget
        Core-hours available for the batch.
    """
    s, c, b = _check(scores, cost, budget)
    order = _descending(s, c)
    rank = np.empty(s.shape[0], dtype=int)
    rank[order] = np.arange(1, s.shape[0] + 1)
    picked = _first_fit(order, c, b)
    return Selection(np.asarray(picked, dtype=int),
                     tuple(f"{_ordinal(int(rank[i]))} by score" for i in picked))


def knapsack_greedy(values, cost, budget: float) -> Selection:
    """0/1 knapsack maximising the summed value: the best of three greedy fills.

    First fit by value/cost, first fit by value, and the best single item; the fill with
    the largest summed value wins (ties in that order). Values must be >= 0 (e.g. hit
    probabilities). The result is at least half the optimum (the classic bound for the
    ratio fill with the best single item, from memory) and never below picking by value.

    Parameters
    ----------
    values, cost : array_like, shape (n,)
        Value of each item (>= 0) and its predicted cost, core-hours.
    budget
        Core-hours available.
    """
    v, c, b = _check(values, cost, budget)
    if np.any(v < 0):
        raise InputError("knapsack values must be >= 0", line=int(np.flatnonzero(v < 0)[0]),
                         expected="values >= 0")
    ratio = v / c
    order = _descending(ratio)
    rank = np.empty(v.shape[0], dtype=int)
    rank[order] = np.arange(1, v.shape[0] + 1)
    picked = _first_fit(order, c, b)
    by_value = _descending(v, c)
    value_rank = np.empty(v.shape[0], dtype=int)
    value_rank[by_value] = np.arange(1, v.shape[0] + 1)
    plain = _first_fit(by_value, c, b)
    fits = np.flatnonzero(c <= b)
    best_total = v[picked].sum()
    choice = Selection(np.asarray(picked, dtype=int),
                       tuple(f"{_ordinal(int(rank[i]))} by value per core-hour" for i in picked))
    if v[plain].sum() > best_total:
        best_total = v[plain].sum()
        choice = Selection(np.asarray(plain, dtype=int),
                           tuple(f"{_ordinal(int(value_rank[i]))} by value (fills the budget "
                                 "better than value per core-hour)" for i in plain))
    if fits.size:
        best = int(fits[_descending(v[fits], c[fits])[0]])
        if v[best] > best_total:
            return Selection(np.asarray([best]), ("best single item within budget",))
    return choice


def knapsack_exact(values, cost, budget: float) -> Selection:
    """Exact 0/1 knapsack by a dynamic programme over the Pareto frontier (cost, value).

    Exact for real-valued costs; the frontier can grow exponentially in the worst case,
    so this is meant for small pools and for checking :func:`knapsack_greedy`.

    Raises
    ------
    InputError
        When the frontier exceeds :data:`KNAPSACK_EXACT_MAX_STATES`.
    """
    v, c, b = _check(values, cost, budget)
    # each state: (cost, value, chosen indices as a tuple)
    states: list[tuple[float, float, tuple[int, ...]]] = [(0.0, 0.0, ())]
    for i in range(v.shape[0]):
        extended = [(sc + c[i], sv + v[i], sel + (i,)) for sc, sv, sel in states
                    if sc + c[i] <= b + 1e-12 * max(1.0, b)]
        merged = sorted(states + extended, key=lambda t: (t[0], -t[1]))
        frontier: list[tuple[float, float, tuple[int, ...]]] = []
        for st in merged:
            if not frontier or st[1] > frontier[-1][1]:
                frontier.append(st)
        states = frontier
        if len(states) > KNAPSACK_EXACT_MAX_STATES:
            raise InputError("pool too large for the exact knapsack", value=v.shape[0],
                             expected="a smaller pool, or knapsack_greedy")
    best = max(states, key=lambda t: t[1])
    return Selection(np.asarray(best[2], dtype=int),
                     tuple("in the optimal knapsack" for _ in best[2]))


def _minmax(a: np.ndarray) -> np.ndarray:
    span = a.max() - a.min() if a.size else 0.0
    return (a - a.min()) / span if span > 0 else np.zeros_like(a)


def diverse_within_budget(
    scores, X, cost, budget: float, *, trade_off: float = 0.5, X_labelled=None
) -> Selection:
    """Greedy max-min batch: balance score against distance to what is already chosen.

    At each step, among candidates that still fit the budget, pick the one maximising
    ``(1 - trade_off) * s + trade_off * d`` where ``s`` is the score and ``d`` the
    distance to the nearest already-picked (or labelled) candidate, both min-max scaled
    over the candidates still fitting. Features are standardised first; NaN counts as
    the column mean.

    Parameters
    ----------
    scores, cost : array_like, shape (n,)
    X : array_like, shape (n, d)
        Features (any units).
    budget
        Core-hours.
    trade_off
        0 is pure score order, 1 is pure max-min distance; in [0, 1].
    X_labelled : array_like, shape (m, d), optional
        Labelled candidates also count as "already chosen" for distances.
    """
    s, c, b = _check(scores, cost, budget)
    if not 0 <= trade_off <= 1:
        raise InputError("trade_off must be in [0, 1]", value=trade_off, expected="0 <= trade_off <= 1")
    Xa = np.asarray(X, dtype=float)
    if Xa.ndim != 2 or Xa.shape[0] != s.shape[0]:
        raise InputError("X has the wrong shape", value=Xa.shape, expected=f"({s.shape[0]}, d)")
    n = s.shape[0]
    lab = None if X_labelled is None else np.asarray(X_labelled, dtype=float)
    Z = standardise(Xa if lab is None or lab.shape[0] == 0 else np.vstack([Xa, lab]))
    pool = Z[:n]
    nearest = np.full(n, np.inf)
    if lab is not None and lab.shape[0]:
        for row in Z[n:]:
            nearest = np.minimum(nearest, np.linalg.norm(pool - row, axis=1))
    where = ("batch so far" if lab is None or lab.shape[0] == 0
             else "labelled rows and the batch so far")
    available = np.ones(n, dtype=bool)
    left = b
    picked: list[int] = []
    notes: list[str] = []
    while True:
        cand = np.flatnonzero(available & (c <= left))
        if cand.size == 0:
            break
        s_part = _minmax(s[cand])
        if np.all(np.isinf(nearest[cand])):
            util = s_part
            d_rank = None
        else:
            d = nearest[cand]
            util = (1 - trade_off) * s_part + trade_off * _minmax(d)
            d_rank = np.empty(cand.size, dtype=int)
            d_rank[_descending(d)] = np.arange(1, cand.size + 1)
        j = int(_descending(util, c[cand])[0])
        i = int(cand[j])
        s_rank = int(np.sum(s[cand] > s[i])) + 1
        note = f"score rank {s_rank} of the {cand.size} that still fit (1 = best)"
        if d_rank is not None:
            note += (f", novelty rank {int(d_rank[j])} (1 = farthest from the "
                     f"{where})")
        picked.append(i)
        notes.append(note)
        available[i] = False
        left -= c[i]
        nearest = np.minimum(nearest, np.linalg.norm(pool - pool[i], axis=1))
    return Selection(np.asarray(picked, dtype=int), tuple(notes))


def clustered_within_budget(
    scores, X, cost, budget: float, *, n_clusters: int, rng: np.random.Generator
) -> Selection:
    """k-means in standardised feature space, then round-robin over clusters.

    Clusters are visited in order of their best remaining score; each visit takes the
    best-scoring remaining member that fits the remaining budget.

    Parameters
    ----------
    scores, cost : array_like, shape (n,)
    X : array_like, shape (n, d)
    budget
        Core-hours.
    n_clusters
        Number of clusters (capped at n).
    rng
        Seeds k-means.
    """
    from sklearn.cluster import KMeans

    s, c, b = _check(scores, cost, budget)
    if int(n_clusters) < 1:
        raise InputError("n_clusters must be >= 1", value=n_clusters, expected="an integer >= 1")
    n = s.shape[0]
    if n == 0:
        return Selection(np.asarray([], dtype=int), ())
    Z = standardise(np.asarray(X, dtype=float))
    k = min(int(n_clusters), n)
    seed = int(rng.integers(0, 2**31 - 1))
    labels = KMeans(n_clusters=k, n_init=3, random_state=seed).fit_predict(Z) if k > 1 \
        else np.zeros(n, dtype=int)
    members = {lab: [int(i) for i in _descending(s, c) if labels[i] == lab] for lab in range(k)}
    left = b
    picked: list[int] = []
    notes: list[str] = []
    progress = True
    while progress:
        progress = False
        # clusters in order of their best remaining score (ties: cluster number)
        live = [lab for lab in range(k) if members[lab]]
        live.sort(key=lambda lab: (-s[members[lab][0]], lab))
        for lab in live:
            fitting = [i for i in members[lab] if c[i] <= left]
            if not fitting:
                members[lab] = []
                continue
            i = fitting[0]
            members[lab].remove(i)
            picked.append(i)
            notes.append(f"best left in cluster {lab + 1} of {k}")
            left -= c[i]
            progress = True
    return Selection(np.asarray(picked, dtype=int), tuple(notes))
