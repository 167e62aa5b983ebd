"""Turn a :class:`~prescreen.report.build.ReportData` into one self-contained HTML file.

Figures are embedded as base64 PNG ``data:`` URLs; the page has no JavaScript and no
external URL (styles are inline), so it opens offline and can be attached to a proposal
as one file. Numbers are printed rounded; each table cell that shows a stored number
also carries the full value in a ``data-value`` attribute, so tests (and readers) can
check it against the campaign store.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    from prescreen.report.build import ReportData

__all__ = ["TEMPLATE", "FIGURE_IDS", "render_html", "figures"]

#: The template file, inside the package (``prescreen/report/templates``).
TEMPLATE = "report.html.j2"
#: IDs of the figures every report has (replay and validation figures when available).
FIGURE_IDS: tuple[str, ...] = ("fig-expected-hits", "fig-shap-bar", "fig-shap-beeswarm",
                               "fig-shap-dependence", "fig-cost")


def _fmt(value: Any, digits: int = 3) -> str:
    """Rounded text of a number (``"–"`` for missing)."""
    if value is None:
        return "–"
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    if math.isnan(v):
        return "–"
    if v == int(v) and abs(v) < 1e15 and digits <= 0:
        return f"{int(v)}"
    return f"{v:.{digits}f}"


def _proxy_note(ge: Any, data: ReportData) -> str:
    """What the importances are (correlations) and where spin-orbit features rank."""
    rows = "" if data.validation is None else f" from {len(data.validation.y)} labelled rows"
    text = f" These are correlations the model learned{rows}, not mechanisms."
    order = list(np.argsort(-ge.importance(), kind="stable"))
    soc = [k for k in order if ge.feature_names[k].startswith("soc ")]
    if soc:
        k = soc[0]
        text += (f" The highest-ranked spin-orbit feature, {ge.display_names[k]}, is "
                 f"{order.index(k) + 1} of {len(order)}.")
    return text


def _cv_cell(column: str, value: Any) -> str:
    """A cell of the per-fold table: counts as whole numbers (a mean keeps one decimal)."""
    if column in ("n_train", "n", "n_positive"):
        return _fmt(value, 0 if float(value).is_integer() else 1)
    return _fmt(value, 3)


def _sig(value: Any, digits: int = 2) -> str:
    """A number with ``digits`` significant digits (costs span 1e-3 to 1e3 core-hours)."""
    text = _fmt(value, 0)
    if text == "–":
        return text
    try:
        return f"{float(value):.{digits}g}"
    except (TypeError, ValueError):
        return text


def figures(data: ReportData) -> dict[str, Any]:
    """All figures of the report, as base64 PNG text, keyed by element ID.

    Returns
    -------
    dict
        ``"global"``: list of ``(id, title, caption, png)``; ``"waterfalls"``: dict
        candidate ID -> png; ``"validation"`` and ``"replay"``: lists like ``"global"``.
    """
    from prescreen.explain import PROBABILITY_NOTE, plot_bar, plot_beeswarm, plot_dependence, plot_waterfall
    from prescreen.report import figures as F

    png = F.to_png_base64
    ge = data.global_explanation
    out: dict[str, Any] = {"summary": [
        ("fig-expected-hits", "Expected hits against random selection",
         "Left: expected number of hits in the batch (bar) with its interval, and random picks "
         "from the same pool for the same predicted core-hours (the pool's expected hits per "
         "core-hour times the batch's cost). Right: expected hits per predicted core-hour.", png(F.expected_hits_figure(data.round, data.positive_rule or "spillage ≥ threshold")))]}
    out["shap"] = [
        ("fig-shap-bar", "Which features matter (mean |SHAP|)",
         f"Mean absolute SHAP value over {len(ge.row_ids)} pool candidates. " + PROBABILITY_NOTE
         + _proxy_note(ge, data), png(plot_bar(ge))),
        ("fig-shap-beeswarm", "How each feature moves each candidate",
         "One dot per candidate; colour gives the feature value (low to high within these "
         "rows); right of zero raises the log-odds of high spillage.", png(plot_beeswarm(ge))),
        ("fig-shap-dependence", "Dependence on the top features",
         "SHAP value (log-odds) against the feature value for the most important features.",
         png(plot_dependence(ge))),
    ]
    ex = data.explanation
    out["waterfalls"] = {
        row.id: png(plot_waterfall(ex, row.id, title=f"#{row.rank} {row.id} ({row.formula})",
                                   calibrated=row.probability))
        for row in data.proposals
    }
    out["cost"] = [("fig-cost", "Predicted cost of the batch",
                    "Left: predicted core-hours per candidate with the cost model's interval. "
                    "Right: the running total against the round's budget.",
                    png(F.cost_figure(data.proposals, data.round.budget_core_hours)))]
    out["validation"] = []
    if data.validation is not None:
        y, p = data.validation.y, data.validation.p_oof
        out["validation"] = [
            ("fig-roc", "ROC curve", "Out-of-fold predictions under grouped folds (rows sharing "
             "a formula or chemical system are never split).", png(F.roc_figure(y, p))),
            ("fig-pr", "Precision-recall curve", "Same predictions; the dashed line is the "
             "precision of random picks.", png(F.pr_figure(y, p))),
            ("fig-calibration", "Calibration curve", "Observed fraction of hits against the "
             "predicted probability; points on the diagonal are well calibrated.",
             png(F.calibration_figure(y, p))),
        ]
    out["flows"] = [
        (f"fig-z2-flow-{r.id}", f"Wannier-centre flow of {r.id} ({r.formula}): Z2 = {r.z2}",
         "Hybrid Wannier charge centres of the occupied states with SOC (dots) on each "
         "Wilson loop along k1, against k2 over half the Brillouin zone; red diamonds mark "
         "the middle of the largest gap between centres on each loop. Z2 is the parity of "
         "the number of centres the diamonds jump over from one loop to the next.", png(F.flow_figure(r.flow)))
        for r in data.invariants if r.flow is not None
    ]
    out["replay"] = []
    if data.replay is not None:
        from prescreen.acquire.replay import plot_discovery

        fig = plot_discovery(data.replay.curves, data.replay.y, data.replay.cost,
                             title="Retrospective replay on labelled data")
        out["replay"] = [("fig-discovery", "Discovery curves",
                          _replay_caption(data.replay), png(fig))]
        import matplotlib.pyplot as plt

        plt.close(fig)
    return out


def render_html(data: ReportData) -> str:
    """The report as HTML text (UTF-8, self-contained)."""
    import jinja2

    env = jinja2.Environment(
        loader=jinja2.PackageLoader("prescreen.report", "templates"),
        autoescape=jinja2.select_autoescape(["html", "j2"]),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters["fmt"] = _fmt
    env.filters["sig"] = _sig
    env.filters["full"] = lambda v: "" if v is None else repr(float(v))
    v = data.validation
    cv_rows = []
    enrichment = []
    if v is not None:
        cols = [c for c in ("n_train", "n", "n_positive", "roc_auc", "pr_auc", "brier", "ece",
                            "ef@10") if c in v.cv_table.columns]
        for name, row in v.cv_table.iterrows():
            label = f"fold {name}" if str(name).isdigit() else str(name)
            cv_rows.append((label, [_cv_cell(c, row[c]) for c in cols]))
        enrichment = v.enrichment().to_dict("records")
    else:
        cols = []
    return env.get_template(TEMPLATE).render(
        d=data, figs=figures(data), cv_cols=cols, cv_rows=cv_rows, enrichment=enrichment,
    )


def _replay_caption(replay: Any) -> str:
    """What the discovery curves show: the pool, the protocol, and the cost to half the hits."""
    from prescreen.acquire.replay import random_runs_to_fraction, summarise

    y = np.asarray(replay.y, dtype=int)
    n, p = int(y.size), int(y.sum())
    table = summarise(replay.curves, y, fractions=(0.5,))
    half = "; ".join(
        f"{r.strategy}: " + (f"{r.runs_to_50:.0f} evaluations, {r.core_hours_to_50:.3g} core-hours"
                             if np.isfinite(r.runs_to_50) else "not reached")
        for r in table.itertuples())
    return (f"Replayed on {n} labelled rows with {p} positives"
            + (f"; {replay.protocol}" if replay.protocol else "") + ". "
            "Hits found against spillage evaluations (left) and core-hours (right), median "
            "over seeds with min-max band; dashed: random selection (expected) and the "
            "oracle (every positive first); thin grey lines: half and 80 % of the positives. "
            f"To half of the positives (median over seeds): {half}; random selection is "
            f"expected to need {random_runs_to_fraction(n, p, 0.5):.0f} evaluations. "
            "Past data, not a promise: the pool of a real campaign differs.")

