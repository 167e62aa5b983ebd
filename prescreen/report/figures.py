"""Figures of the allocation report (matplotlib, no display needed).

Every function returns a :class:`matplotlib.figure.Figure` built without pyplot (so no
GUI backend and no global figure state), with labelled axes and units, sized for an A4
page column and drawn in the Okabe-Ito colour-blind-safe palette
(:data:`prescreen.explain.OKABE_ITO`). :func:`to_png_base64` turns one into the text of
a ``data:`` URL.
"""

from __future__ import annotations

import base64
import io
from typing import TYPE_CHECKING, Any

import numpy as np

from prescreen.explain import OKABE_ITO

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

    from prescreen.report.build import ProposalRow, RoundSummary

__all__ = [
    "PNG_DPI",
    "to_png_base64",
    "flow_figure",
    "roc_figure",
    "pr_figure",
    "calibration_figure",
    "expected_hits_figure",
    "cost_figure",
]

#: Resolution of embedded figures (dots per inch): sharp on screen and on paper.
PNG_DPI = 110
_WIDTH_IN = 7.5
_STYLE = {"font.size": 10, "axes.titlesize": 11, "axes.labelsize": 10,
          "xtick.labelsize": 9, "ytick.labelsize": 9, "legend.fontsize": 9}


def to_png_base64(fig: Figure) -> str:
    """The figure as base64-encoded PNG text; the figure is closed afterwards."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=PNG_DPI)
    fig.clear()
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _figure(height: float, ncols: int = 1):
    import matplotlib as mpl
    from matplotlib.figure import Figure

    with mpl.rc_context(_STYLE):
        fig = Figure(figsize=(_WIDTH_IN, height), layout="constrained")
        axes = fig.subplots(1, ncols, squeeze=False)[0]
    return fig, axes


def _tidy(ax: Any) -> None:
    ax.spines[["top", "right"]].set_visible(False)


def flow_figure(flow: Any) -> Figure:
    """The Wannier-centre flow of a Wilson-loop Z2 result (centres against k2)."""
    from prescreen.physics.wilson import plot_flow

    fig, (ax,) = _figure(3.0)
    plot_flow(flow, ax=ax)
    _tidy(ax)
    return fig


def roc_figure(y: np.ndarray, p: np.ndarray) -> Figure:
    """ROC curve of out-of-fold probabilities with the chance diagonal."""
    import matplotlib as mpl
    from sklearn.metrics import roc_auc_score, roc_curve

    fpr, tpr, _ = roc_curve(y, p)
    with mpl.rc_context(_STYLE):
        fig, (ax,) = _figure(4.2)
        ax.plot(fpr, tpr, color=OKABE_ITO["blue"], linewidth=2,
                label=f"model, out of fold (ROC-AUC {roc_auc_score(y, p):.2f})")
        ax.plot([0, 1], [0, 1], color="0.5", linestyle="--", linewidth=1, label="random (AUC 0.5)")
        ax.set_xlabel("false-positive rate (fraction of low-spillage rows flagged)")
        ax.set_ylabel("true-positive rate (recall)")
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1.01)
        ax.set_aspect("equal")
        ax.legend(loc="lower right")
        ax.set_title("ROC curve, grouped cross-validation")
        _tidy(ax)
    return fig


def pr_figure(y: np.ndarray, p: np.ndarray) -> Figure:
    """Precision-recall curve with the base rate (what random picks reach)."""
    import matplotlib as mpl
    from sklearn.metrics import average_precision_score, precision_recall_curve

    precision, recall, _ = precision_recall_curve(y, p)
    rate = float(np.mean(y))
    with mpl.rc_context(_STYLE):
        fig, (ax,) = _figure(4.2)
        ax.step(recall, precision, where="post", color=OKABE_ITO["vermillion"], linewidth=2,
                label=f"model, out of fold (average precision {average_precision_score(y, p):.2f})")
        ax.axhline(rate, color="0.5", linestyle="--", linewidth=1,
                   label=f"random (base rate {rate:.2f})")
        ax.set_xlabel("recall (fraction of high-spillage rows found)")
        ax.set_ylabel("precision (hit rate among flagged)")
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1.01)
        ax.legend(loc="lower left")
        ax.set_title("Precision-recall curve, grouped cross-validation")
        _tidy(ax)
    return fig


def calibration_figure(y: np.ndarray, p: np.ndarray, n_bins: int = 10) -> Figure:
    """Reliability diagram: observed hit fraction against mean predicted probability.

    Equal-width bins (as :func:`prescreen.validation.expected_calibration_error`); the
    marker area grows with the number of rows in the bin, written beside each point; the
    bars are 95 % Wilson score intervals of the observed fraction (scipy's
    ``binomtest(...).proportion_ci(method="wilson")``); ticks along the bottom show where
    the predictions fall (a narrow band means an unsharp model, whatever its ECE).
    """
    import matplotlib as mpl
    from scipy import stats

    from prescreen.validation import expected_calibration_error

    y = np.asarray(y, dtype=float)
    p = np.asarray(p, dtype=float)
    bins = np.minimum((p * n_bins).astype(int), n_bins - 1)
    count = np.bincount(bins, minlength=n_bins)
    used = count > 0
    mean_p = np.bincount(bins, weights=p, minlength=n_bins)[used] / count[used]
    frac = np.bincount(bins, weights=y, minlength=n_bins)[used] / count[used]
    with mpl.rc_context(_STYLE):
        fig, (ax,) = _figure(4.2)
        ax.plot([0, 1], [0, 1], color="0.5", linestyle="--", linewidth=1, label="perfect calibration")
        ax.plot(mean_p, frac, color=OKABE_ITO["green"], linewidth=1.5)
        hits = np.bincount(bins, weights=y, minlength=n_bins)[used].round().astype(int)
        ci = [stats.binomtest(int(k), int(n)).proportion_ci(confidence_level=0.95,
                                                            method="wilson")
              for k, n in zip(hits, count[used])]
        ax.errorbar(mean_p, frac, yerr=[frac - np.array([c.low for c in ci]),
                                        np.array([c.high for c in ci]) - frac],
                    fmt="none", color=OKABE_ITO["green"], capsize=3, linewidth=1,
                    label="95 % Wilson interval")
        ax.plot(p, np.full(len(p), -0.01), "|", color="0.3", markersize=8,
                label="out-of-fold predictions")
        ax.scatter(mean_p, frac, s=20 + 180 * count[used] / count.max(), color=OKABE_ITO["green"],
                   zorder=3, label=f"model (ECE {expected_calibration_error(y, p, n_bins=n_bins):.3f})")
        for x, f, c in zip(mean_p, frac, count[used]):
            ax.annotate(f"n={c}", (x, f), textcoords="offset points", xytext=(6, -10), fontsize=8)
        ax.set_xlabel(f"mean predicted probability in bin ({n_bins} equal-width bins)")
        ax.set_ylabel("observed fraction with high spillage")
        ax.set_xlim(0, 1)
        ax.set_ylim(-0.03, 1.02)
        ax.set_aspect("equal")
        ax.legend(loc="upper left")
        ax.set_title("Calibration (reliability) curve, out of fold")
        _tidy(ax)
    return fig


def expected_hits_figure(summary: RoundSummary, hit: str = "spillage ≥ threshold") -> Figure:
    """Expected hits of the batch against random picks, and the same per core-hour.

    ``hit`` says what a hit is, for the axis label (e.g. ``"spillage >= 0.5"``).
    """
    import matplotlib as mpl

    lo, hi = summary.expected_hits_interval
    with mpl.rc_context(_STYLE):
        fig, (left, right) = _figure(3.4, ncols=2)
        colours = [OKABE_ITO["blue"], "0.6"]
        names = ["this batch", "random picks\n(same core-hours)"]
        left.bar(names, [summary.expected_hits, summary.random_expected_hits], color=colours)
        left.errorbar([0], [summary.expected_hits],
                      yerr=[[summary.expected_hits - lo], [hi - summary.expected_hits]],
                      color="black", capsize=6, linewidth=1.2,
                      label=f"{summary.interval_level:.0%} interval")
        left.set_ylabel(f"expected hits\n({hit.replace('>=', '≥')})")
        left.legend(loc="upper right")
        left.set_title(f"Round {summary.number}: {summary.n_picks} candidates")
        right.bar(["this batch", "random picks\n(pool average)"],
                  [summary.hits_per_core_hour, summary.random_hits_per_core_hour], color=colours)
        right.set_ylabel("expected hits per core-hour")
        right.set_title("Return on compute")
        for ax in (left, right):
            _tidy(ax)
    return fig


def cost_figure(rows: tuple[ProposalRow, ...], budget: float) -> Figure:
    """Predicted core-hours per proposed candidate (with interval) and the running total."""
    import matplotlib as mpl

    mid = np.array([r.cost_core_hours for r in rows])
    low = np.array([r.cost_low for r in rows])
    high = np.array([r.cost_high for r in rows])
    with mpl.rc_context(_STYLE):
        fig, (left, right) = _figure(1.8 + 0.22 * len(rows), ncols=2)
        y = np.arange(len(rows))[::-1]
        left.barh(y, mid, color=OKABE_ITO["orange"])
        ok = np.isfinite(low) & np.isfinite(high)
        left.errorbar(mid[ok], y[ok], xerr=[mid[ok] - low[ok], high[ok] - mid[ok]],
                      fmt="none", color="black", capsize=3, linewidth=1)
        left.set_yticks(y, [f"{r.id} ({r.formula})" for r in rows])
        left.set_xlabel("predicted core-hours\n(bar: central; line: 90 % interval)")
        left.set_title("Cost per candidate")
        steps = np.arange(1, len(rows) + 1)
        right.plot(steps, np.cumsum(mid), color=OKABE_ITO["orange"], linewidth=2, marker="o",
                   label="cumulative predicted cost")
        from matplotlib.ticker import MaxNLocator

        right.xaxis.set_major_locator(MaxNLocator(nbins=10, integer=True))
        right.set_xlim(0.5, len(rows) + 0.5)
        right.axhline(budget, color=OKABE_ITO["black"], linestyle="--", linewidth=1,
                      label=f"budget {budget:.3g} core-h")
        right.set_xlabel("candidates in rank order")
        right.set_ylabel("core-hours")
        right.set_ylim(0, max(budget, float(np.sum(mid))) * 1.15)
        right.legend(loc="upper left")
        right.set_title("Batch total against budget")
        for ax in (left, right):
            _tidy(ax)
    return fig
