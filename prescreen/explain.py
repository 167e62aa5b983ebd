"""SHAP explanations of the spillage classifier, and the plots that show them.

:func:`explain` runs SHAP's TreeExplainer (Lundberg et al. 2020) on every LightGBM
booster of a :class:`~prescreen.model.SpillageClassifier` ensemble and averages the
values over the members.

Scale
-----
All SHAP values here are in **log-odds** (the booster's raw margin), not probability.
For one row the values add up to the ensemble's mean raw margin::

    margin = base_value + sum_j values[j]
    p_uncalibrated = 1 / (1 + exp(-margin))

``p_uncalibrated`` is the probability of the *uncalibrated* booster average. The
probability the tool reports (:meth:`SpillageClassifier.predict_proba`) is the
calibrated one: the calibration map (Platt or isotonic) applied to each member's margin,
then averaged. That map is monotone (non-decreasing), so a feature that pushes the
margin up never pushes the calibrated probability down, but SHAP values cannot be read
as differences of calibrated probabilities. (Reading SHAP values of a boosted
classifier as probabilities is a frequent confusion; shap issues 214 and 922.)

One-class models
----------------
A booster trained on one class has only single-leaf trees: every SHAP value is zero and
the margin is constant. :func:`explain` returns such a *degenerate* explanation (all
zeros, ``degenerate=True``) rather than failing inside SHAP (shap issue 1437); a
classifier that knows only one label is refused with an :class:`InputError`.

References
----------
S. M. Lundberg et al., "From local explanations to global understanding with
explainable AI for trees", Nat. Mach. Intell. 2, 56-67 (2020).
M. Okabe and K. Ito, "Color Universal Design (CUD): how to make figures and
presentations that are friendly to colorblind people" (2002) — the colour palette.
"""

from __future__ import annotations

import re
import warnings
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from prescreen.errors import InputError

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

__all__ = [
    "SCALE_LABEL",
    "PROBABILITY_NOTE",
    "OKABE_ITO",
    "Explanation",
    "explain",
    "display_name",
    "feature_unit",
    "plot_bar",
    "plot_beeswarm",
    "plot_dependence",
    "plot_waterfall",
]

#: Axis label for SHAP values (what the numbers are).
SCALE_LABEL = "SHAP value (log-odds of high spillage)"
#: One sentence that says how to turn log-odds into a probability.
PROBABILITY_NOTE = (
    "SHAP values are in log-odds (raw margin). For a row, margin = base value + sum of "
    "its SHAP values, and p = 1 / (1 + exp(-margin)) is the uncalibrated probability; "
    "the reported probability is a monotone (calibration) map of the margin, so signs "
    "and order carry over but SHAP values are not probability differences."
)

#: Okabe-Ito colour-blind-safe palette (Okabe and Ito 2002), by name.
OKABE_ITO: dict[str, str] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
}
#: Colour of contributions that raise / lower the log-odds.
_UP, _DOWN = OKABE_ITO["vermillion"], OKABE_ITO["blue"]
#: Sequential colour map for feature values (viridis is perceptually uniform and
#: readable with the common colour-vision deficiencies; matplotlib documentation).
_VALUE_CMAP = "viridis"
#: Figure width in inches: fits an A4 text column at 100 % (legible when printed).
_WIDTH_IN = 7.5
#: Smallest font size used in figures, in points.
_FONT_PT = 9

# ------------------------------------------------------------------- readable names
#: Magpie element properties: readable name and unit ("" for dimensionless). Units are
#: those of matminer's Magpie tables (covalent radius in pm, melting point in K, ground
#: state volume per atom in cubic angstrom, band gap in eV, moment in Bohr magnetons;
#: from memory, matching the values in the tables).
_MAGPIE_PROPS: dict[str, tuple[str, str]] = {
    "Number": ("atomic number Z", ""),
    "MendeleevNumber": ("Mendeleev number", ""),
    "AtomicWeight": ("atomic mass", "u"),
    "MeltingT": ("elemental melting point", "K"),
    "Column": ("periodic-table group", ""),
    "Row": ("periodic-table period", ""),
    "CovalentRadius": ("covalent radius", "pm"),
    "Electronegativity": ("Pauling electronegativity", ""),
    "NsValence": ("s valence electrons", "e"),
    "NpValence": ("p valence electrons", "e"),
    "NdValence": ("d valence electrons", "e"),
    "NfValence": ("f valence electrons", "e"),
    "NValence": ("valence electrons", "e"),
    "NsUnfilled": ("unfilled s states", ""),
    "NpUnfilled": ("unfilled p states", ""),
    "NdUnfilled": ("unfilled d states", ""),
    "NfUnfilled": ("unfilled f states", ""),
    "NUnfilled": ("unfilled valence states", ""),
    "GSvolume_pa": ("elemental volume per atom", "Å³"),
    "GSbandgap": ("elemental band gap", "eV"),
    "GSmagmom": ("elemental magnetic moment", "μB"),
    "SpaceGroupNumber": ("elemental space-group number", ""),
}
_MAGPIE_STATS: dict[str, str] = {
    "minimum": "min",
    "maximum": "max",
    "range": "range",
    "mean": "mean",
    "avg_dev": "mean abs. dev.",
    "mode": "mode",
}
#: Fixed names (prescreen's own featurisers): readable name and unit.
_FIXED: dict[str, tuple[str, str]] = {
    "valence frac s": ("fraction of valence electrons in s", ""),
    "valence frac p": ("fraction of valence electrons in p", ""),
    "valence frac d": ("fraction of valence electrons in d", ""),
    "valence frac f": ("fraction of valence electrons in f", ""),
    "ionic max character": ("max pair ionic character", ""),
    "ionic mean character": ("mean ionic character", ""),
    "electronegativity std": ("electronegativity spread (std)", ""),
    "soc p mean": ("mean valence p spin-orbit splitting", "eV"),
    "soc p max": ("max valence p spin-orbit splitting", "eV"),
    "soc d mean": ("mean valence d spin-orbit splitting", "eV"),
    "soc d max": ("max valence d spin-orbit splitting", "eV"),
    "soc p-electron weighted": ("p-electron-weighted spin-orbit splitting", "eV"),
    "heavy fraction Z>=37": ("fraction of atoms with Z ≥ 37", ""),
    "heavy fraction Z>=55": ("fraction of atoms with Z ≥ 55", ""),
    "valence electron parity": ("valence electron count parity (1 = odd)", ""),
    "struct atoms per cell": ("atoms per cell", ""),
    "struct thickness": ("layer thickness", "Å"),
    "struct buckling": ("buckling", "Å"),
    "struct height std": ("spread of atom heights (std)", "Å"),
    "struct vacuum": ("vacuum gap", "Å"),
    "struct area per atom": ("in-plane area per atom", "Å²"),
    "struct area per formula unit": ("in-plane area per formula unit", "Å²"),
    "struct lattice a": ("lattice constant a", "Å"),
    "struct lattice b": ("lattice constant b", "Å"),
    "struct lattice gamma": ("lattice angle γ", "°"),
    "struct cn mean": ("mean coordination number", ""),
    "struct cn min": ("min coordination number", ""),
    "struct cn max": ("max coordination number", ""),
    "struct bond mean": ("mean bond length", "Å"),
    "struct bond min": ("shortest bond", "Å"),
    "struct bond max": ("longest bond", "Å"),
    "struct bond std": ("bond length spread (std)", "Å"),
    "struct bond rel mean": ("mean bond / sum of covalent radii", ""),
    "struct bond rel min": ("min bond / sum of covalent radii", ""),
    "struct bond rel max": ("max bond / sum of covalent radii", ""),
    "struct layer group": ("layer-group number", ""),
    "struct has inversion": ("has inversion centre (1 = yes)", ""),
    "struct has horizontal mirror": ("has horizontal mirror (1 = yes)", ""),
}
_MAGPIE_RE = re.compile(r"^magpie[ _](minimum|maximum|range|mean|avg_dev|mode)[ _](\w+)$")
_STOICH_RE = re.compile(r"^stoich (\d+)-norm$")


def feature_unit(name: str) -> str:
    """Unit of a feature (``""`` for dimensionless or unknown names).

    Parameters
    ----------
    name
        Column name as produced by :mod:`prescreen.featurise`.
    """
    match = _MAGPIE_RE.match(name)
    if match and match.group(2) in _MAGPIE_PROPS:
        return _MAGPIE_PROPS[match.group(2)][1]
    return _FIXED.get(name, ("", ""))[1]


def display_name(name: str, *, unit: bool = True) -> str:
    """A readable label for a feature column, with its unit in brackets.

    Unknown names are returned unchanged, so the mapping never hides a feature.

    Parameters
    ----------
    name
        Column name, e.g. ``"magpie mean Electronegativity"``.
    unit
        Append ``" [unit]"`` when the feature has one.

    Examples
    --------
    >>> display_name("magpie mean CovalentRadius")
    'mean covalent radius [pm]'
    >>> display_name("struct thickness")
    'layer thickness [Å]'
    """
    match = _MAGPIE_RE.match(name)
    if match and match.group(2) in _MAGPIE_PROPS:
        label = f"{_MAGPIE_STATS[match.group(1)]} {_MAGPIE_PROPS[match.group(2)][0]}"
    elif (stoich := _STOICH_RE.match(name)) is not None:
        label = f"stoichiometry L{stoich.group(1)} norm"
    elif name in _FIXED:
        label = _FIXED[name][0]
    else:
        return name
    u = feature_unit(name)
    return f"{label} [{u}]" if unit and u else label


# --------------------------------------------------------------------- explanation
@dataclass(frozen=True)
class Explanation:
    """SHAP values of a set of rows, averaged over the ensemble members.

    Attributes
    ----------
    values : ndarray, shape (n, d)
        SHAP values in log-odds (raw margin) per row and feature.
    base_value : float
        Mean raw margin of the members over their training data (log-odds): the value
        every row starts from.
    feature_names : tuple of str, length d
        Column names, as in the feature table.
    data : ndarray, shape (n, d)
        The feature values explained (NaN where missing).
    row_ids : tuple of str, length n
        Row labels (the index of the feature table, or ``"0"``, ``"1"``, ...).
    degenerate : bool
        True when every member is a constant (a one-class fit): all values are zero.
    """

    values: NDArray[np.float64]
    base_value: float
    feature_names: tuple[str, ...]
    data: NDArray[np.float64]
    row_ids: tuple[str, ...]
    degenerate: bool = False

    @property
    def scale(self) -> str:
        """Always ``"log-odds"``: see the module docstring."""
        return "log-odds"

    @property
    def display_names(self) -> tuple[str, ...]:
        """Readable feature labels with units, length d."""
        return tuple(display_name(n) for n in self.feature_names)

    def margin(self) -> NDArray[np.float64]:
        """``base_value + values.sum(axis=1)``, shape (n,), log-odds."""
        return self.base_value + self.values.sum(axis=1)

    def uncalibrated_probability(self) -> NDArray[np.float64]:
        """``1 / (1 + exp(-margin))``, shape (n,); not the calibrated probability."""
        return 1.0 / (1.0 + np.exp(-self.margin()))

    def row(self, key: int | str) -> int:
        """Position of a row given its ID (index label) or, failing that, its position.

        A label is looked up first, as pandas' ``.loc`` would: with a table sorted or
        sliced from a larger one (labels 129, 122, ...), ``row(129)`` is the row labelled
        129, and a plain integer is read as a position only when no row has that label.
        """
        if str(key) in self.row_ids:
            return self.row_ids.index(str(key))
        if isinstance(key, (int, np.integer)):
            if not -len(self.row_ids) <= int(key) < len(self.row_ids):
                raise InputError("row out of range", value=int(key),
                                 expected=f"0 .. {len(self.row_ids) - 1}")
            return int(key) % len(self.row_ids)
        if key not in self.row_ids:
            raise InputError("unknown row ID", value=key, expected="an ID of the explained rows")
        return self.row_ids.index(key)

    def importance(self) -> NDArray[np.float64]:
        """Mean absolute SHAP value per feature, shape (d,), log-odds."""
        return np.abs(self.values).mean(axis=0) if len(self.values) else np.zeros(len(self.feature_names))


def _boosters(model: Any) -> list[Any]:
    import lightgbm as lgb

    if isinstance(model, lgb.Booster):
        return [model]
    if isinstance(model, (list, tuple)) and model and all(isinstance(m, lgb.Booster) for m in model):
        return list(model)
    members = getattr(model, "members_", None)
    if members is None:
        raise InputError("cannot explain this model", value=type(model).__name__,
                         expected="a fitted SpillageClassifier, a LightGBM Booster or a list of them")
    classes = getattr(model, "classes_", None)
    if classes is not None and len(classes) < 2:
        raise InputError("the model was fitted on one class only; there is nothing to explain",
                         value=list(classes), expected="a model trained on both classes")
    return list(members)


def _matrix(model: Any, X: Any) -> tuple[NDArray[np.float64], tuple[str, ...], tuple[str, ...]]:
    """Feature matrix in the model's column order, its names and row IDs."""
    import pandas as pd

    expected = getattr(model, "feature_names_in_", None)
    if isinstance(X, pd.DataFrame):
        names = tuple(str(c) for c in X.columns)
        if expected is not None:
            missing = [c for c in expected if c not in set(names)]
            if missing:
                raise InputError("feature table lacks columns the model was trained on",
                                 value=missing[:5], expected=f"all {len(expected)} model features")
            X = X.loc[:, list(expected)]
            names = tuple(str(c) for c in expected)
        rows = tuple(str(i) for i in X.index)
        return X.to_numpy(dtype=np.float64), names, rows
    arr = np.asarray(X, dtype=np.float64)
    if arr.ndim != 2:
        raise InputError("features must be a 2-D table", value=arr.shape, expected="(n, d)")
    if expected is not None:
        if arr.shape[1] != len(expected):
            raise InputError("wrong number of feature columns", value=arr.shape[1],
                             expected=f"{len(expected)} columns")
        names = tuple(str(c) for c in expected)
    else:
        names = tuple(f"f{i}" for i in range(arr.shape[1]))
    return arr, names, tuple(str(i) for i in range(arr.shape[0]))


def _is_constant(booster: Any) -> bool:
    """True when every tree of the booster is a single leaf (nothing was learned)."""
    return all(t["num_leaves"] <= 1 for t in booster.dump_model()["tree_info"])


def _import_shap():
    with warnings.catch_warnings():
        # shap 0.51 uses matplotlib colormap APIs that warn on import; not our concern.
        warnings.simplefilter("ignore", DeprecationWarning)
        warnings.simplefilter("ignore", PendingDeprecationWarning)
        import shap
    return shap


def explain(model: Any, X: Any) -> Explanation:
    """SHAP values (log-odds) of ``X`` under the ensemble, averaged over members.

    Parameters
    ----------
    model
        A fitted :class:`~prescreen.model.SpillageClassifier` (or a LightGBM
        ``Booster``, or a list of them).
    X : DataFrame or array, shape (n, d)
        Features; DataFrame columns are put in the model's order.

    Returns
    -------
    Explanation
        ``values`` (n, d) and ``base_value`` in log-odds, with
        ``base_value + values.sum(1)`` equal to the members' mean raw margin.

    Raises
    ------
    InputError
        A model that is not a tree ensemble, fitted on one class, or features that do
        not match it.
    """
    boosters = _boosters(model)
    data, names, rows = _matrix(model, X)
    if all(_is_constant(b) for b in boosters):
        base = float(np.mean([b.predict(data[:1] if len(data) else np.zeros((1, data.shape[1])),
                                        raw_score=True)[0] for b in boosters]))
        return Explanation(values=np.zeros_like(data), base_value=base, feature_names=names,
                           data=data, row_ids=rows, degenerate=True)
    shap = _import_shap()
    values = np.zeros_like(data)
    base = 0.0
    for booster in boosters:
        explainer = shap.TreeExplainer(booster)
        result = explainer(data)  # the call API returns (n, d) for binary LightGBM
        vals = np.asarray(result.values, dtype=np.float64)
        if vals.ndim == 3:  # (n, d, 2): keep the positive class
            vals = vals[..., -1]
        values += vals
        ev = np.asarray(explainer.expected_value, dtype=np.float64).ravel()
        base += float(ev[-1])
    k = len(boosters)
    return Explanation(values=values / k, base_value=base / k, feature_names=names,
                       data=data, row_ids=rows, degenerate=False)


# ----------------------------------------------------------------------------- plots
def _style() -> dict[str, Any]:
    return {"font.size": _FONT_PT + 1, "axes.titlesize": _FONT_PT + 2,
            "axes.labelsize": _FONT_PT + 1, "xtick.labelsize": _FONT_PT,
            "ytick.labelsize": _FONT_PT, "legend.fontsize": _FONT_PT}


def _top(explanation: Explanation, max_display: int) -> NDArray[np.intp]:
    """Indices of the most important features, most important first."""
    if max_display < 1:
        raise InputError("max_display must be at least 1", value=max_display, expected="an int >= 1")
    order = np.argsort(-explanation.importance(), kind="stable")
    return order[: min(max_display, len(order))]


def _new_figure(height: float) -> Figure:
    from matplotlib.figure import Figure

    return Figure(figsize=(_WIDTH_IN, height), layout="constrained")


def plot_bar(explanation: Explanation, *, max_display: int = 12) -> Figure:
    """Global importance: mean |SHAP value| (log-odds) per feature, largest on top.

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib as mpl

    idx = _top(explanation, max_display)
    imp = explanation.importance()[idx]
    labels = [explanation.display_names[i] for i in idx]
    with mpl.rc_context(_style()):
        fig = _new_figure(1.2 + 0.32 * len(idx))
        ax = fig.add_subplot()
        y = np.arange(len(idx))[::-1]
        ax.barh(y, imp, color=OKABE_ITO["blue"])
        for yi, v in zip(y, imp):
            ax.text(v, yi, f" {v:.3f}", va="center", fontsize=_FONT_PT)
        ax.set_yticks(y, labels)
        ax.set_xlabel("mean |SHAP value| (log-odds of high spillage)")
        ax.set_title(f"Feature importance over {len(explanation.row_ids)} candidates")
        ax.set_xlim(0, max(float(imp.max()) if len(imp) else 0.0, 1e-9) * 1.25)
        ax.spines[["top", "right"]].set_visible(False)
    return fig


def _value_colours(column: NDArray[np.float64]) -> NDArray[np.float64]:
    """Feature values mapped to [0, 1] by rank (robust to outliers); NaN stays NaN."""
    out = np.full(column.shape, np.nan)
    ok = np.isfinite(column)
    if ok.sum() > 1:
        ranks = np.argsort(np.argsort(column[ok], kind="stable"), kind="stable")
        out[ok] = ranks / (ok.sum() - 1)
    elif ok.sum() == 1:
        out[ok] = 0.5
    return out


def plot_beeswarm(explanation: Explanation, *, max_display: int = 12, random_state: int = 0) -> Figure:
    """Every row's SHAP value (log-odds) per top feature, coloured by the feature value.

    Points are spread vertically at random (seeded by ``random_state``) so that they do
    not hide each other; grey points have a missing feature value.

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib as mpl

    rng = np.random.default_rng(random_state)
    idx = _top(explanation, max_display)
    cmap = mpl.colormaps[_VALUE_CMAP]
    with mpl.rc_context(_style()):
        fig = _new_figure(1.4 + 0.36 * len(idx))
        ax = fig.add_subplot()
        for pos, j in zip(range(len(idx) - 1, -1, -1), idx):
            vals = explanation.values[:, j]
            colour = _value_colours(explanation.data[:, j])
            jitter = rng.uniform(-0.3, 0.3, size=len(vals))
            missing = ~np.isfinite(colour)
            ax.scatter(vals[missing], pos + jitter[missing], s=12, color="0.6", linewidths=0)
            ax.scatter(vals[~missing], pos + jitter[~missing], s=12,
                       c=colour[~missing], cmap=cmap, vmin=0, vmax=1, linewidths=0)
        ax.axvline(0.0, color="0.4", linewidth=0.8)
        ax.set_yticks(np.arange(len(idx))[::-1], [explanation.display_names[j] for j in idx])
        ax.set_xlabel(SCALE_LABEL)
        ax.set_title("Effect of each feature on each candidate")
        sm = mpl.cm.ScalarMappable(cmap=cmap, norm=mpl.colors.Normalize(0, 1))
        bar = fig.colorbar(sm, ax=ax, ticks=[0, 1], aspect=30, pad=0.01)
        bar.ax.set_yticklabels(["low", "high"])
        bar.set_label("feature value (rank within rows)")
        ax.spines[["top", "right"]].set_visible(False)
    return fig


def plot_dependence(explanation: Explanation, *, k: int = 4) -> Figure:
    """SHAP value (log-odds) against the feature value for the ``k`` top features.

    Returns
    -------
    matplotlib.figure.Figure
        A grid of ``k`` panels, two per row.
    """
    import matplotlib as mpl

    idx = _top(explanation, k)
    ncols = 2 if len(idx) > 1 else 1
    nrows = int(np.ceil(len(idx) / ncols))
    with mpl.rc_context(_style()):
        fig = _new_figure(2.6 * nrows + 0.4)
        axes = np.atleast_1d(fig.subplots(nrows, ncols, squeeze=False).ravel())
        for ax, j in zip(axes, idx):
            ax.scatter(explanation.data[:, j], explanation.values[:, j], s=14,
                       color=OKABE_ITO["blue"], linewidths=0)
            ax.axhline(0.0, color="0.4", linewidth=0.8)
            ax.set_xlabel(explanation.display_names[j])
            ax.set_ylabel("SHAP (log-odds)")
            ax.spines[["top", "right"]].set_visible(False)
        for ax in axes[len(idx):]:
            ax.set_visible(False)
        fig.suptitle(f"Dependence of the log-odds on the {len(idx)} most important features")
    return fig


def plot_waterfall(explanation: Explanation, row: int | str, *, max_display: int = 8,
                   title: str | None = None, calibrated: float | None = None) -> Figure:
    """How one candidate's log-odds build up from the base value, feature by feature.

    Bars run from the base value (mean margin over the training data) to the row's
    margin; features beyond ``max_display`` are lumped into one bar. The axis label gives
    the ``calibrated`` probability when it is passed (the one to read), else the
    uncalibrated ``1 / (1 + exp(-margin))``.

    Parameters
    ----------
    explanation
        From :func:`explain`.
    row
        Position or ID of the row.
    max_display
        Features shown individually, largest |SHAP| first.
    title
        Figure title (default: the row ID).
    calibrated
        The row's calibrated probability (e.g. from ``predict_proba``), shown instead of
        the uncalibrated one, which can disagree with it widely.

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib as mpl

    i = explanation.row(row)
    vals = explanation.values[i]
    order = np.argsort(-np.abs(vals), kind="stable")
    shown = order[: min(max_display, len(order))]
    rest = order[len(shown):]
    labels = []
    for j in shown:
        v = explanation.data[i, j]
        shown_value = "missing" if not np.isfinite(v) else f"{v:.3g}"
        labels.append(f"{explanation.display_names[j]} = {shown_value}")
    contribs = [float(vals[j]) for j in shown]
    if len(rest):
        labels.append(f"{len(rest)} other features")
        contribs.append(float(vals[rest].sum()))
    margin = float(explanation.margin()[i])
    with mpl.rc_context(_style()):
        fig = _new_figure(1.5 + 0.34 * len(contribs))
        ax = fig.add_subplot()
        start = explanation.base_value
        y = np.arange(len(contribs))[::-1]
        # Draw from the base value down the list (top bar first).
        for yi, c in zip(y, contribs):
            ax.barh(yi, c, left=start, color=_UP if c >= 0 else _DOWN, height=0.6)
            ax.text(start + c, yi, f" {c:+.2f}" if c >= 0 else f"{c:+.2f} ",
                    va="center", ha="left" if c >= 0 else "right", fontsize=_FONT_PT)
            start += c
        ax.axvline(explanation.base_value, color="0.4", linewidth=0.8, linestyle="--")
        ax.axvline(margin, color=OKABE_ITO["black"], linewidth=1.0)
        ax.set_yticks(y, labels)
        if calibrated is not None:
            second = f"(calibrated probability {calibrated:.2f}; bars: raw log-odds)"
        else:
            p = 1.0 / (1.0 + np.exp(-margin))
            second = f"(uncalibrated p = 1/(1+exp({-margin:+.2f})) = {p:.2f})"
        ax.set_xlabel(f"log-odds of high spillage: base {explanation.base_value:.2f} → "
                      f"{margin:.2f}\n{second}")
        lo = min(explanation.base_value, margin, *(explanation.base_value + np.cumsum(contribs)))
        hi = max(explanation.base_value, margin, *(explanation.base_value + np.cumsum(contribs)))
        pad = max(0.15 * (hi - lo), 0.3)
        ax.set_xlim(lo - pad, hi + pad)
        ax.set_title(title or f"Why {explanation.row_ids[i]} scores as it does")
        ax.spines[["top", "right"]].set_visible(False)
        if explanation.degenerate:
            ax.text(0.5, 0.5, "constant model: no feature changes the score",
                    transform=ax.transAxes, ha="center")
    return fig

