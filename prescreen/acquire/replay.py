"""Retrospective replay: simulate campaigns on labelled data and score them.

A replay hides the labels, starts from a random labelled set, and runs rounds of
fit -> propose (one strategy, one core-hour budget per round) -> reveal labels, recording
the discovery curve: hits against the number of spillage evaluations ("DFT runs"; each
evaluation is two DFT calculations, without and with spin-orbit coupling, so ratios
between strategies are the same whichever unit is used) and against core-hours.

References
----------
- random selection, in expectation: after ``n`` evaluations ``n P / N`` hits, and the
  ``k``-th positive is found after ``k (N + 1) / (P + 1)`` evaluations on average (the
  mean of the k-th order statistic of sampling without replacement; from memory, checked
  by simulation in the tests);
- the oracle, which computes all positives first, cheapest first.

Figures of merit: the acceleration factor to a fraction ``f`` of the positives is the
expected random number of evaluations over the strategy's; the enrichment at ``k`` is
the hit rate in the first ``k`` evaluations over the base rate ``P / N``.
"""

from __future__ import annotations

import math
from typing import Any, Callable, Iterable, Protocol, Sequence

import numpy as np
import pandas as pd

from prescreen.acquire.measures import PoolView
from prescreen.acquire.strategies import Strategy, random_selection
from prescreen.errors import InputError

__all__ = [
    "ModelLike",
    "replay",
    "random_reference",
    "oracle_reference",
    "runs_to_fraction",
    "random_runs_to_fraction",
    "summarise",
    "plot_discovery",
    "strategy_name",
    "CURVE_COLUMNS",
]

#: Columns of every discovery-curve table, in order.
CURVE_COLUMNS: tuple[str, ...] = ("strategy", "seed", "round", "item", "n_runs", "core_hours",
                                  "hits", "fraction_found", "batch_size", "model_fitted", "used")


class ModelLike(Protocol):
    """What replay needs of a classifier (``prescreen.model.SpillageClassifier`` fits)."""

    def fit(self, X: Any, y: Any, *, groups: Any = None) -> Any: ...

    def predict_uncertainty(self, X: Any) -> tuple[np.ndarray, np.ndarray]: ...

    def ensemble_proba(self, X: Any) -> np.ndarray: ...


def strategy_name(strategy: Any) -> str:
    """A readable name for a strategy, a :func:`functools.partial` of one, or a schedule."""
    if hasattr(strategy, "for_round"):
        return (f"two_phase({strategy_name(strategy.explore)} x{strategy.explore_rounds}"
                f" -> {strategy_name(strategy.exploit)})")
    func = getattr(strategy, "func", None)
    if func is not None:
        kw = ", ".join(f"{k}={v}" for k, v in sorted(strategy.keywords.items()))
        return f"{strategy_name(func)}({kw})" if kw else strategy_name(func)
    return getattr(strategy, "__name__", type(strategy).__name__)


def _rows(X) -> Callable[[np.ndarray], Any]:
    if isinstance(X, pd.DataFrame):
        return lambda idx: X.iloc[idx]
    arr = np.asarray(X)
    return lambda idx: arr[idx]


def _check_inputs(X, y, cost, formulas, predicted_cost):
    n = len(y)
    y_arr = np.asarray(y)
    if y_arr.ndim != 1 or not np.isin(y_arr, [0, 1, True, False]).all():
        raise InputError("labels must be 0/1", value=np.unique(y_arr)[:5].tolist(),
                         expected="a 1-D array of 0 and 1")
    if len(X) != n:
        raise InputError("X and y differ in length", value=(len(X), n), expected="equal lengths")
    arrays = {"cost": cost, "predicted_cost": cost if predicted_cost is None else predicted_cost}
    out = {}
    for name, values in arrays.items():
        arr = np.asarray(values, dtype=float)
        if arr.shape != (n,):
            raise InputError(f"{name} has the wrong shape", value=arr.shape, expected=f"({n},)")
        bad = np.flatnonzero(~np.isfinite(arr) | (arr <= 0))
        if bad.size:
            raise InputError(f"{name} must be > 0 core-hours", line=int(bad[0]),
                             value=float(arr[bad[0]]), expected="a finite cost > 0")
        out[name] = arr
    groups = None if formulas is None else np.asarray(formulas, dtype=object)
    if groups is not None and groups.shape != (n,):
        raise InputError("formulas has the wrong shape", value=groups.shape, expected=f"({n},)")
    return y_arr.astype(int), out["cost"], out["predicted_cost"], groups


def replay(
    X,
    y,
    cost,
    formulas,
    strategy: Strategy | Any,
    model_factory: Callable[[int], ModelLike],
    *,
    n_initial: int,
    batch_budget: float,
    n_rounds: int | None = None,
    until: float | None = None,
    seeds: Iterable[int] = (0, 1, 2, 3, 4),
    predicted_cost=None,
    name: str | None = None,
    min_per_class: int = 2,
    progress: bool = True,
) -> pd.DataFrame:
    """Simulate campaigns of one strategy over several seeds.

    Parameters
    ----------
    X : DataFrame or array, shape (N, d)
        Features given to the model (and, as floats, to the diversity selectors).
    y : array_like of {0, 1}, shape (N,)
        Labels (1: spillage at or above the threshold).
    cost : array_like, shape (N,)
        Recorded core-hours of each evaluation (what the campaign actually pays).
    formulas : array_like of str, shape (N,), or None
        Passed to the model as ``groups``.
    strategy : Strategy, or a schedule with ``for_round(round, spent)`` (:class:`TwoPhase`)
    model_factory : callable seed -> model
        Makes a fresh, unfitted model each round (see :class:`ModelLike`).
    n_initial
        Random evaluations before the first model (counted as DFT runs).
    batch_budget
        Core-hours per round, spent on predicted cost.
    n_rounds, until
        Stop after ``n_rounds`` rounds, or once ``until`` (a fraction in (0, 1]) of the
        positives is found; the run also stops when the pool is empty or nothing fits.
    seeds
        One campaign per seed; the seed drives the initial set, the models and the strategy.
    predicted_cost : array_like, shape (N,), optional
        Cost the strategy sees (default: ``cost``).
    name
        Strategy label in the output (default: :func:`strategy_name`).
    min_per_class
        Until the labelled set has this many of each class, rounds pick at random
        (``model_fitted`` is False in those rows).
    progress
        Show a tqdm bar.

    Returns
    -------
    DataFrame
        Columns :data:`CURVE_COLUMNS`: one row per evaluation, in the order computed
        (within a round, in the strategy's pick order); round 0 is the initial set;
        ``item`` is the row of ``X`` evaluated; ``n_runs``, ``core_hours`` and ``hits`` are
        cumulative; ``batch_size`` is the size
        of that round; ``used`` names the strategy that picked the batch.
    """
    from tqdm.auto import tqdm

    y_arr, cost_arr, pred_arr, groups = _check_inputs(X, y, cost, formulas, predicted_cost)
    N = y_arr.shape[0]
    P = int(y_arr.sum())
    if P == 0:
        raise InputError("no positives in the labelled data", expected="at least one label 1")
    if not 0 < n_initial < N:
        raise InputError("n_initial out of range", value=n_initial, expected=f"1 .. {N - 1}")
    if not (np.isfinite(batch_budget) and batch_budget > 0):
        raise InputError("batch_budget must be > 0 core-hours", value=batch_budget, expected="> 0")
    if until is not None and not 0 < until <= 1:
        raise InputError("until must be a fraction of the positives", value=until,
                         expected="0 < until <= 1")
    if n_rounds is not None and n_rounds < 0:
        raise InputError("n_rounds must be >= 0", value=n_rounds, expected=">= 0")
    label = name or strategy_name(strategy)
    take = _rows(X)
    X_float = np.asarray(X, dtype=float)
    ids = np.asarray([str(i) for i in range(N)], dtype=object)
    rows: list[tuple] = []
    seeds = list(seeds)
    bar = tqdm(total=len(seeds), desc=f"replay {label}", disable=not progress, leave=False)
    for seed in seeds:
        rng = np.random.default_rng(seed)
        labelled = np.zeros(N, dtype=bool)
        first = rng.choice(N, size=n_initial, replace=False)
        labelled[first] = True
        count = {"runs": 0, "hours": 0.0, "hits": 0}

        def record(picked: np.ndarray, r: int, fitted: bool, used: str) -> None:
            for i in picked:  # pick order within the round
                count["runs"] += 1
                count["hours"] += float(cost_arr[i])
                count["hits"] += int(y_arr[i])
                rows.append((label, seed, r, int(i), count["runs"], count["hours"], count["hits"],
                             count["hits"] / P, int(picked.size), fitted, used))

        record(first, 0, False, "initial random")
        r = 0
        while True:
            hits = int(y_arr[labelled].sum())
            if n_rounds is not None and r >= n_rounds:
                break
            if until is not None and hits >= math.ceil(until * P - 1e-9):
                break
            if labelled.all():
                break
            r += 1
            pool = np.flatnonzero(~labelled)
            lab_idx = np.flatnonzero(labelled)
            counts = np.bincount(y_arr[lab_idx], minlength=2)
            fitted = bool(counts.min() >= min_per_class)
            if fitted:
                model = model_factory(int(rng.integers(0, 2**31 - 1)))
                model.fit(take(lab_idx), y_arr[lab_idx],
                          groups=None if groups is None else groups[lab_idx])
                mean, std = model.predict_uncertainty(take(pool))
                members = model.ensemble_proba(take(pool)) if hasattr(model, "ensemble_proba") else None
                chosen = strategy.for_round(r - 1, count["hours"]) if hasattr(strategy, "for_round") else strategy
            else:
                mean = np.full(pool.size, counts[1] / counts.sum())  # unused by random selection
                std = np.zeros(pool.size)
                members = None
                chosen = random_selection
            view = PoolView.build(ids[pool], X_float[pool], np.clip(mean, 0, 1), std,
                                  pred_arr[pool], members=members, X_labelled=X_float[lab_idx])
            proposal = chosen(view, float(batch_budget), rng)
            if len(proposal) == 0:
                break
            picked = np.asarray([int(i) for i in proposal.ids], dtype=int)
            labelled[picked] = True
            record(picked, r, fitted, strategy_name(chosen))
        bar.update(1)
    bar.close()
    return pd.DataFrame(rows, columns=list(CURVE_COLUMNS))


def random_reference(y, cost) -> pd.DataFrame:
    """Expected discovery curve of random selection, one row per evaluation count 0..N.

    Core-hours are ``n`` times the mean cost (the expectation of a random order).
    """
    y_arr = np.asarray(y, dtype=int)
    c = np.asarray(cost, dtype=float)
    N, P = y_arr.shape[0], int(y_arr.sum())
    n = np.arange(N + 1)
    hits = n * P / N
    return pd.DataFrame({"strategy": "random (expected)", "seed": -1, "round": n, "item": -1,
                         "n_runs": n,
                         "core_hours": n * c.mean(), "hits": hits, "fraction_found": hits / P,
                         "batch_size": 1, "model_fitted": False, "used": "random (expected)"})


def oracle_reference(y, cost) -> pd.DataFrame:
    """Discovery curve of the oracle: every positive first, cheapest first."""
    y_arr = np.asarray(y, dtype=int)
    c = np.asarray(cost, dtype=float)
    order = np.lexsort((c, -y_arr))  # positives first, then by cost
    N, P = y_arr.shape[0], int(y_arr.sum())
    hits = np.concatenate([[0], np.cumsum(y_arr[order])])
    spent = np.concatenate([[0.0], np.cumsum(c[order])])
    n = np.arange(N + 1)
    return pd.DataFrame({"strategy": "oracle", "seed": -1, "round": n,
                         "item": np.concatenate([[-1], order]), "n_runs": n,
                         "core_hours": spent, "hits": hits, "fraction_found": hits / P,
                         "batch_size": 1, "model_fitted": False, "used": "oracle"})


def runs_to_fraction(curve: pd.DataFrame, n_positives: int, fraction: float,
                     column: str = "n_runs") -> float:
    """Smallest ``column`` value (evaluations or core-hours) at which the curve of ONE
    campaign has found ``ceil(fraction * n_positives)`` hits; ``inf`` if never."""
    need = math.ceil(fraction * n_positives - 1e-9)
    reached = curve.loc[curve["hits"] >= need - 1e-9, column]
    return float(reached.min()) if len(reached) else math.inf


def random_runs_to_fraction(n_total: int, n_positives: int, fraction: float) -> float:
    """Expected evaluations for random selection to find ``ceil(fraction * P)`` positives."""
    k = math.ceil(fraction * n_positives - 1e-9)
    return k * (n_total + 1) / (n_positives + 1)



def _hits_at(curve: pd.DataFrame, k: float) -> float:
    """Hits after ``k`` evaluations on a step curve (last point with n_runs <= k)."""
    before = curve.loc[curve["n_runs"] <= k]
    return float(before["hits"].iloc[-1]) if len(before) else 0.0


def summarise(curves: pd.DataFrame, y, *, fractions: Sequence[float] = (0.5, 0.8),
              k: int | None = None, baseline: str | None = None) -> pd.DataFrame:
    """Median over seeds of the figures of merit, one row per strategy.

    Parameters
    ----------
    curves : DataFrame
        Output of :func:`replay` (several strategies may be concatenated).
    y : array_like of {0, 1}, shape (N,)
    fractions
        Fractions of the positives for "runs to reach".
    k
        Evaluations at which enrichment is measured (default: the number of positives).
    baseline
        A strategy name in ``curves``; adds ``fewer_runs_vs_baseline_<f>`` = 1 - runs /
        baseline runs (median over seeds of each).

    Returns
    -------
    DataFrame
        Columns ``strategy, n_seeds, runs_to_<f>, core_hours_to_<f>, acceleration_<f>,
        enrichment_at_<k>`` (+ baseline columns); ``inf`` when a fraction was not reached
        by the median seed.
    """
    y_arr = np.asarray(y, dtype=int)
    N, P = y_arr.shape[0], int(y_arr.sum())
    k_eval = P if k is None else int(k)
    out = []
    for strat, block in curves.groupby("strategy", sort=False):
        row: dict[str, Any] = {"strategy": strat, "n_seeds": int(block["seed"].nunique())}
        per_seed = [g.sort_values("n_runs") for _, g in block.groupby("seed", sort=True)]
        for f in fractions:
            tag = f"{round(100 * f)}"
            runs = [runs_to_fraction(g, P, f) for g in per_seed]
            hours = [runs_to_fraction(g, P, f, "core_hours") for g in per_seed]
            row[f"runs_to_{tag}"] = float(np.median(runs))
            row[f"core_hours_to_{tag}"] = float(np.median(hours))
            row[f"acceleration_{tag}"] = random_runs_to_fraction(N, P, f) / row[f"runs_to_{tag}"]
        enrich = [(_hits_at(g, k_eval) / k_eval) / (P / N) for g in per_seed]
        row[f"enrichment_at_{k_eval}"] = float(np.median(enrich))
        out.append(row)
    table = pd.DataFrame(out)
    if baseline is not None:
        if baseline not in set(table["strategy"]):
            raise InputError("baseline strategy not in the curves", value=baseline,
                             expected=f"one of {sorted(table['strategy'])}")
        base = table.set_index("strategy").loc[baseline]
        for f in fractions:
            tag = f"{round(100 * f)}"
            table[f"fewer_runs_vs_baseline_{tag}"] = 1 - table[f"runs_to_{tag}"] / base[f"runs_to_{tag}"]
    return table


def _median_curve(block: pd.DataFrame, xcol: str, grid: np.ndarray) -> tuple[np.ndarray, ...]:
    """Median, min and max over seeds of step curves on ``grid``; NaN once any seed ended."""
    curves = []
    for _, g in block.groupby("seed", sort=True):
        g = g.sort_values(xcol)
        pos = np.searchsorted(g[xcol].to_numpy(), grid, side="right") - 1
        vals = np.where(pos >= 0, g["hits"].to_numpy()[np.maximum(pos, 0)], 0.0)
        curves.append(np.where(grid > g[xcol].max(), np.nan, vals))
    A = np.vstack(curves)
    live = ~np.isnan(A).any(axis=0)
    med = np.full(grid.shape, np.nan)
    lo, hi = med.copy(), med.copy()
    med[live] = np.median(A[:, live], axis=0)
    lo[live] = A[:, live].min(axis=0)
    hi[live] = A[:, live].max(axis=0)
    return med, lo, hi


def plot_discovery(curves: pd.DataFrame, y, cost, *, path=None, title: str | None = None):
    """Discovery curves: hits against evaluations (left) and against core-hours (right).

    Each strategy is drawn as the median over seeds with a min-max band; random
    (expected) and the oracle are dashed references.

    Parameters
    ----------
    curves : DataFrame from :func:`replay` (strategies concatenated)
    y, cost : array_like, shape (N,)
        Labels and recorded core-hours, for the references.
    path : str or Path, optional
        Where to save the figure (format from the suffix).

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt

    refs = pd.concat([random_reference(y, cost), oracle_reference(y, cost)])
    fig, axes = plt.subplots(1, 2, figsize=(11, 5.6))
    palette = plt.get_cmap("tab10" if curves["strategy"].nunique() <= 10 else "tab20")
    xlabels = {"n_runs": "Spillage evaluations (each = 2 DFT runs: without and with SOC)",
               "core_hours": "Core-hours spent"}
    P = int(np.asarray(y).sum())
    x_max = {c: float(curves[c].max()) for c in xlabels}
    for ax, xcol in zip(axes, xlabels):
        grid = np.linspace(0, x_max[xcol], 300)
        for j, (strat, block) in enumerate(curves.groupby("strategy", sort=False)):
            med, lo, hi = _median_curve(block, xcol, grid)
            colour = palette(j % 20)
            ax.plot(grid, med, color=colour, linestyle=("-", "-.")[(j // 10) % 2],
                    label=f"{strat} (median of {block['seed'].nunique()})")
            ax.fill_between(grid, lo, hi, color=colour, alpha=0.12, linewidth=0)
        for strat, block in refs.groupby("strategy", sort=False):
            b = block.loc[block[xcol] <= x_max[xcol] * 1.0001]
            ax.plot(b[xcol], b["hits"], linestyle="--", color="grey" if strat == "oracle" else "black",
                    linewidth=1, label=strat)
        ax.axhline(0.5 * P, color="0.7", linewidth=0.6)
        ax.axhline(0.8 * P, color="0.7", linewidth=0.6)
        ax.set_xlabel(xlabels[xcol])
        ax.set_ylabel(f"Hits found (positives in pool: {P})")
        ax.set_xlim(0, x_max[xcol])
        ax.set_ylim(0, P * 1.02)
    handles, labels = axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="lower center", ncol=3, fontsize=7, frameon=False)
    if title:
        fig.suptitle(title)
    fig.tight_layout(rect=(0, 0.06 + 0.025 * math.ceil(len(labels) / 3), 1, 1))
    if path is not None:
        from pathlib import Path

        from prescreen.io.atomic import replacing

        fmt = Path(path).suffix.lstrip(".") or "png"
        with replacing(path) as tmp:  # written whole: never a half-drawn figure
            fig.savefig(tmp, dpi=150, format=fmt)
    return fig
