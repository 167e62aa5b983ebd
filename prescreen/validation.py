"""Validation that cannot leak: grouped folds by chemistry, metrics, cross-validation.

Entries that share a reduced formula (polymorphs, duplicates) or a chemical system are
strongly correlated in their band topology: Claussen, Bernevig and Regnault,
Phys. Rev. B 102, 245117 (2020), found that entries sharing formula and space group
share the topological label 98 % of the time. A random split would let the model look
up the answer from a sibling in the training fold, so every split here keeps such
entries together.

References
----------
N. Claussen, B. A. Bernevig, N. Regnault, "Detection of topological materials with
machine learning", Phys. Rev. B 102, 245117 (2020).
M. P. Naeini, G. F. Cooper, M. Hauskrecht, "Obtaining well calibrated probabilities
using Bayesian binning", AAAI (2015) — expected calibration error.
J.-F. Truchon, C. I. Bayly, "Evaluating virtual screening methods: good and bad metrics
for the 'early recognition' problem", J. Chem. Inf. Model. 47, 488 (2007) — enrichment
factor.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from prescreen.errors import InputError

if TYPE_CHECKING:  # pragma: no cover - typing only
    from pymatgen.core import Composition

__all__ = [
    "GROUP_KEYS",
    "ECE_N_BINS",
    "LOG_LOSS_CLIP",
    "parse_formulas",
    "chemistry_keys",
    "integer_reduced_formula",
    "MAX_FORMULA_MULTIPLIER",
    "FORMULA_INTEGER_TOL",
    "formula_groups",
    "grouped_folds",
    "classification_metrics",
    "expected_calibration_error",
    "enrichment_factor",
    "cross_validate",
]

#: Keys a grouping can use: pymatgen's ``Composition.chemical_system`` (e.g. ``"Mo-S"``)
#: and the reduced formula (e.g. ``"MoS2"``, see :func:`integer_reduced_formula`).
GROUP_KEYS: tuple[str, ...] = ("chemsys", "reduced_formula")

#: Largest factor tried to turn fractional amounts into integers (``Fe0.5O0.5`` -> ``FeO``,
#: ``Mo0.3333S0.6667`` -> ``MoS2``); common practice.
MAX_FORMULA_MULTIPLIER: int = 24

#: Absolute tolerance on "integer" after scaling (atoms per formula unit); hand-written
#: fractional formulas carry three or four decimals (``0.3333``), common practice.
FORMULA_INTEGER_TOL: float = 1e-3

#: Equal-width probability bins of the expected calibration error (common practice:
#: Naeini et al. 2015 and Guo et al., ICML 2017, report ECE with 10 or 15 bins).
ECE_N_BINS: int = 10

#: Probabilities are clipped to [LOG_LOSS_CLIP, 1 - LOG_LOSS_CLIP] in the log loss, so
#: that an isotonic 0 or 1 gives a large finite loss (common practice; 1e-15 was
#: scikit-learn's long-standing default ``eps``).
LOG_LOSS_CLIP: float = 1e-15


# ------------------------------------------------------------------------------ groups
def parse_formulas(formulas: Sequence[str]) -> list["Composition"]:
    """pymatgen Compositions of formulas, parsed once per distinct formula.

    Parameters
    ----------
    formulas
        Chemical formulas, length ``n`` (``"MoS2"``, ``"Fe0.5O0.5"``, ``"S2Mo"``).

    Returns
    -------
    list of pymatgen.core.Composition
        Length ``n`` (equal formulas share one object).

    Raises
    ------
    InputError
        A formula pymatgen cannot read, one with no atoms, or one with a symbol that is
        not an element (pymatgen would read ``"Xx2"`` as a dummy species); names the
        entry (0-based position) and the formula.
    """
    from pymatgen.core import Composition, Element

    cache: dict[str, Composition] = {}
    out = []
    for i, formula in enumerate(formulas):
        if formula not in cache:
            try:
                comp = Composition(str(formula))
                if comp.num_atoms <= 0:
                    raise ValueError("no atoms")
                unknown = [str(el) for el in comp.elements if not isinstance(el, Element)]
                if unknown:  # pymatgen reads "Xx2" as a dummy species
                    raise ValueError(f"not a chemical element: {', '.join(unknown)}")
            except Exception as exc:  # pymatgen raises several types for bad formulas
                raise InputError(
                    f"cannot read the formula: {exc}",
                    line=i,
                    value=formula,
                    expected="a chemical formula such as MoS2",
                ) from exc
            cache[formula] = comp
        out.append(cache[formula])
    return out


def chemistry_keys(formulas: Sequence[str]) -> pd.DataFrame:
    """Reduced formula and chemical system of every formula, by pymatgen.

    Parameters
    ----------
    formulas
        Chemical formulas, length ``n``.

    Returns
    -------
    pandas.DataFrame
        ``n`` rows, columns ``reduced_formula`` and ``chemsys``.
    """
    comps = parse_formulas(formulas)
    return pd.DataFrame(
        [(integer_reduced_formula(c), c.chemical_system) for c in comps], columns=["reduced_formula", "chemsys"]
    )


def integer_reduced_formula(comp: "Composition") -> str:
    """pymatgen's reduced formula after scaling fractional amounts to integers.

    pymatgen keeps ``Composition("Fe0.5O0.5").reduced_formula == "Fe0.5O0.5"`` while
    ``Composition("FeO").reduced_formula == "FeO"``; for grouping these must agree. The
    amounts are multiplied by the smallest factor up to :data:`MAX_FORMULA_MULTIPLIER`
    that makes all of them integers within :data:`FORMULA_INTEGER_TOL`; formulas with no
    such factor keep pymatgen's reduced formula of the fractional composition.
    """
    from pymatgen.core import Composition

    amounts = np.array(list(comp.values()), dtype=np.float64)
    for factor in range(1, MAX_FORMULA_MULTIPLIER + 1):
        scaled = amounts * factor
        if np.all(np.abs(scaled - np.round(scaled)) <= FORMULA_INTEGER_TOL):
            whole = Composition({el: round(a * factor) for el, a in comp.items()})
            return whole.reduced_formula
    return comp.fractional_composition.reduced_formula


def formula_groups(formulas: Sequence[str], *, by: Sequence[str] = GROUP_KEYS) -> NDArray[np.intp]:
    """Group id per entry: entries sharing any key in ``by`` end in the same group.

    The groups are the connected components of "shares a reduced formula or a chemical
    system" (for the default ``by``; equal reduced formulas imply equal chemical
    systems, so these are the chemical systems).

    Parameters
    ----------
    formulas
        Chemical formulas, length ``n``.
    by
        Keys among :data:`GROUP_KEYS`.

    Returns
    -------
    ndarray of int, shape (n,)
        Group ids ``0 .. n_groups - 1``, numbered in order of first appearance.
    """
    by = tuple(by)
    bad = [key for key in by if key not in GROUP_KEYS]
    if not by or bad:
        raise InputError("unknown grouping key", value=bad or by, expected=f"keys among {GROUP_KEYS}")
    keys = chemistry_keys(formulas)
    n = len(keys)
    parent = np.arange(n)

    def root(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    for key in by:
        codes, _ = pd.factorize(keys[key])
        first: dict[int, int] = {}
        for i, code in enumerate(codes):
            if code in first:
                a, b = root(i), root(first[code])
                if a != b:
                    parent[max(a, b)] = min(a, b)
            else:
                first[code] = i
    roots = np.array([root(i) for i in range(n)], dtype=np.intp)
    codes, _ = pd.factorize(roots)
    return codes.astype(np.intp)


def grouped_folds(
    formulas: Sequence[str],
    *,
    n_splits: int = 5,
    by: Sequence[str] = GROUP_KEYS,
    y: ArrayLike | None = None,
    random_state: int | np.random.Generator | None = None,
) -> list[tuple[NDArray[np.intp], NDArray[np.intp]]]:
    """K-fold splits in which no reduced formula or chemical system straddles folds.

    Parameters
    ----------
    formulas
        Chemical formulas, length ``n``.
    n_splits
        Number of folds (>= 2, at most the number of groups).
    by
        Which keys tie entries together (see :func:`formula_groups`).
    y
        Optional 0/1 labels, shape ``(n,)``; when given the folds are also stratified
        (scikit-learn's ``StratifiedGroupKFold``) so that each test fold holds positives
        when there are enough.
    random_state
        Seed or generator for the shuffling of groups.

    Returns
    -------
    list of (train_idx, test_idx)
        ``n_splits`` pairs of sorted integer index arrays; every entry is in exactly one
        test fold.
    """
    from sklearn.model_selection import GroupKFold, StratifiedGroupKFold

    groups = formula_groups(formulas, by=by)
    n_groups = int(groups.max()) + 1 if len(groups) else 0
    if not isinstance(n_splits, (int, np.integer)) or n_splits < 2:
        raise InputError("bad number of folds", value=n_splits, expected="an int >= 2")
    if n_groups < n_splits:
        raise InputError(
            f"only {n_groups} chemistry groups (by {', '.join(by)}) for {n_splits} folds",
            value=n_groups,
            expected=f">= {n_splits} groups",
        )
    seed = int(np.random.default_rng(random_state).integers(0, 2**31 - 1))
    X_dummy = np.zeros((len(groups), 1))
    if y is None:
        splitter = GroupKFold(n_splits=n_splits, shuffle=True, random_state=seed)
        splits = splitter.split(X_dummy, groups=groups)
    else:
        labels = np.asarray(y)
        if labels.shape != groups.shape:
            raise InputError("y must have one label per formula", value=labels.shape, expected=str(groups.shape))
        splitter = StratifiedGroupKFold(n_splits=n_splits, shuffle=True, random_state=seed)
        splits = splitter.split(X_dummy, labels, groups)
    try:
        return [(np.sort(tr).astype(np.intp), np.sort(te).astype(np.intp)) for tr, te in splits]
    except ValueError as exc:  # scikit-learn's refusal, e.g. fewer rows per class than folds
        counts = {} if y is None else dict(zip(*(v.tolist() for v in np.unique(np.asarray(y), return_counts=True))))
        raise InputError(
            f"cannot make {n_splits} grouped folds: {exc}",
            value=f"rows per label {counts}" if counts else f"{len(groups)} rows",
            expected=f"at least {n_splits} rows of a label and {n_splits} groups",
        ) from exc


# ----------------------------------------------------------------------------- metrics
def expected_calibration_error(y_true: ArrayLike, p: ArrayLike, *, n_bins: int = ECE_N_BINS) -> float:
    """Expected calibration error with equal-width probability bins.

    ``ECE = sum_b (n_b / n) * |mean(y in b) - mean(p in b)|`` over the ``n_bins`` bins
    ``[0, 1/n_bins), ..., [1 - 1/n_bins, 1]`` (the last bin closed).

    Parameters
    ----------
    y_true
        0/1 labels, shape ``(n,)``.
    p
        Predicted probabilities of label 1, shape ``(n,)``.
    n_bins
        Number of equal-width bins.

    Returns
    -------
    float
        In ``[0, 1]``.
    """
    y_true = np.asarray(y_true, dtype=np.float64)
    p = np.asarray(p, dtype=np.float64)
    bins = np.minimum((p * n_bins).astype(np.intp), n_bins - 1)
    sum_y = np.bincount(bins, weights=y_true, minlength=n_bins)
    sum_p = np.bincount(bins, weights=p, minlength=n_bins)
    return float(np.sum(np.abs(sum_y - sum_p)) / len(p))


def enrichment_factor(y_true: ArrayLike, p: ArrayLike, k: int) -> float:
    """Enrichment factor of the top ``k``: hit rate among them over the overall hit rate.

    ``EF@k = (hits in top k / k) / (hits / n)``. Entries tied with the ``k``-th score
    count by their expected share under random tie-breaking, so a constant predictor
    scores exactly 1.

    Parameters
    ----------
    y_true
        0/1 labels, shape ``(n,)``.
    p
        Scores (higher ranks first), shape ``(n,)``.
    k
        Size of the shortlist.

    Returns
    -------
    float
        ``nan`` when ``k > n`` or there are no hits.
    """
    y_true = np.asarray(y_true, dtype=np.float64)
    p = np.asarray(p, dtype=np.float64)
    n = len(p)
    n_hits = y_true.sum()
    if k < 1 or k > n or n_hits == 0:
        return float("nan")
    kth = np.sort(p)[::-1][k - 1]
    above = p > kth
    tied = p == kth
    slots = k - int(above.sum())
    hits_top = y_true[above].sum() + y_true[tied].sum() * slots / int(tied.sum())
    return float((hits_top / k) / (n_hits / n))


def classification_metrics(
    y_true: ArrayLike, p: ArrayLike, *, k_values: Sequence[int] = (10, 50, 100)
) -> dict[str, float]:
    """Ranking, probability and screening metrics of predicted probabilities.

    Parameters
    ----------
    y_true
        0/1 labels, shape ``(n,)``.
    p
        Predicted probability of label 1, shape ``(n,)``, values in ``[0, 1]``.
    k_values
        Shortlist sizes for the enrichment factors.

    Returns
    -------
    dict
        ``n``, ``n_positive``, ``base_rate``; ``roc_auc``; ``pr_auc`` (average precision,
        the step-wise area under the precision-recall curve); ``brier``; ``log_loss``
        (natural log, probabilities clipped by :data:`LOG_LOSS_CLIP`); ``ece``
        (:data:`ECE_N_BINS` equal-width bins); ``ef@k`` per ``k``. Ranking metrics are
        ``nan`` when only one class is present.
    """
    from sklearn.metrics import average_precision_score, roc_auc_score

    y = np.asarray(y_true)
    p = np.asarray(p, dtype=np.float64)
    if y.shape != p.shape or y.ndim != 1:
        raise InputError("labels and probabilities must be 1-D of equal length", value=(y.shape, p.shape))
    if not np.all(np.isin(y, (0, 1))):
        raise InputError("labels must be 0 or 1", value=np.unique(y)[:5].tolist(), expected="0/1")
    if np.any(~np.isfinite(p)) or np.any((p < 0) | (p > 1)):
        raise InputError("probabilities must lie in [0, 1]", value=float(p[~((p >= 0) & (p <= 1))][0]))
    y = y.astype(np.float64)
    both = 0 < y.sum() < len(y)
    q = np.clip(p, LOG_LOSS_CLIP, 1 - LOG_LOSS_CLIP)
    out = {
        "n": float(len(y)),
        "n_positive": float(y.sum()),
        "base_rate": float(y.mean()) if len(y) else float("nan"),
        "roc_auc": float(roc_auc_score(y, p)) if both else float("nan"),
        "pr_auc": float(average_precision_score(y, p)) if both else float("nan"),
        "brier": float(np.mean((p - y) ** 2)),
        "log_loss": float(-np.mean(y * np.log(q) + (1 - y) * np.log1p(-q))),
        "ece": expected_calibration_error(y, p),
    }
    for k in k_values:
        out[f"ef@{k}"] = enrichment_factor(y, p, int(k))
    return out


# ------------------------------------------------------------------- cross-validation
def _take(X: Any, idx: NDArray[np.intp]) -> Any:
    if isinstance(X, (pd.DataFrame, pd.Series)):
        return X.iloc[idx]
    return np.asarray(X)[idx]


def cross_validate(
    model_factory: Callable[[], Any],
    X: Any,
    y: ArrayLike,
    formulas: Sequence[str],
    *,
    n_splits: int = 5,
    by: Sequence[str] = GROUP_KEYS,
    k_values: Sequence[int] = (10, 50, 100),
    random_state: int | np.random.Generator | None = None,
    progress: bool = True,
    label: str = "",
    sample_weight: ArrayLike | None = None,
) -> pd.DataFrame:
    """Grouped k-fold metrics of a model.

    Parameters
    ----------
    model_factory
        Called once per fold for a fresh model with ``fit(X, y)`` and
        ``predict_proba(X) -> (n, 2)``; an unfitted scikit-learn style estimator is
        accepted too and cloned (``sklearn.base.clone``) for each fold. If its ``fit`` accepts ``groups``, the chemistry
        groups of the training rows are passed, so its own inner splits are grouped too.
    X
        What the model reads, ``n`` rows: a feature DataFrame/array, or the formulas
        themselves for formula-based baselines.
    y
        0/1 labels, shape ``(n,)``.
    formulas
        Chemical formula per row, used only to build the folds.
    n_splits, by, random_state
        See :func:`grouped_folds` (folds are stratified by ``y``).
    k_values
        Shortlist sizes for the enrichment factors.
    progress
        Show a progress bar over folds.
    label
        Text for the progress bar.
    sample_weight
        Training weights, shape ``(n,)``, passed to ``fit`` of models that accept them
        (so the recipe validated is the recipe fitted); metrics stay unweighted.

    Returns
    -------
    pandas.DataFrame
        One row per fold (index ``0 .. n_splits-1``), rows ``"mean"`` and ``"std"``
        (sample standard deviation over folds), and ``"pooled"``: the metrics of all
        out-of-fold predictions together (each row predicted by the model that did not
        see its group; the enrichment factors of small folds are only defined here);
        columns ``n_train`` and the keys of
        :func:`classification_metrics`. A metric that is undefined in a fold (``nan``:
        no positive in the test fold, or ``k`` larger than the fold) is left out of that
        column's mean and std; the per-fold rows show where.
    """
    from tqdm.auto import tqdm

    y = np.asarray(y)
    if len(y) != len(formulas):
        raise InputError("y and formulas differ in length", value=(len(y), len(formulas)))
    if len(X) != len(y):
        raise InputError("X and y differ in length", value=(len(X), len(y)),
                         expected="one row of X per label")
    if not callable(model_factory) and hasattr(model_factory, "fit"):
        from sklearn.base import clone

        estimator = model_factory
        model_factory = lambda: clone(estimator)  # noqa: E731
    folds = grouped_folds(formulas, n_splits=n_splits, by=by, y=y, random_state=random_state)
    groups = formula_groups(formulas, by=by)
    rows = {}
    pooled = np.full(len(y), np.nan)
    for i, (tr, te) in enumerate(tqdm(folds, desc=label or "cross-validation", disable=not progress, leave=False)):
        model = model_factory()
        fit_kwargs = {}
        params = inspect.signature(model.fit).parameters
        if "groups" in params:
            fit_kwargs["groups"] = groups[tr]
        if sample_weight is not None and "sample_weight" in params:
            fit_kwargs["sample_weight"] = np.asarray(sample_weight, dtype=float)[tr]
        model.fit(_take(X, tr), y[tr], **fit_kwargs)
        p = np.asarray(model.predict_proba(_take(X, te)))[:, 1]
        rows[i] = {"n_train": float(len(tr))} | classification_metrics(y[te], p, k_values=k_values)
        pooled[te] = p
    table = pd.DataFrame.from_dict(rows, orient="index")
    summary = pd.DataFrame({"mean": table.mean(axis=0), "std": table.std(axis=0, ddof=1)}).T
    summary.loc["pooled"] = {"n_train": np.nan} | classification_metrics(y, pooled, k_values=k_values)
    out = pd.concat([table, summary])
    out.index.name = "fold"
    return out
