"""Baselines the classifier must beat, each with ``fit(X, y)`` and ``predict_proba(X)``.

* :class:`RandomBaseline` — a uniform random score: the floor of every ranking metric.
* :class:`BaseRateBaseline` — the training hit rate for everyone: the floor of every
  probability metric (Brier score, log loss).
* :class:`ElementLinearBaseline` — a per-element linear rule: logistic regression on the
  atomic fractions (or presence) of each element, i.e. "compounds of Bi, Sb, Te are
  likely hits".
* :class:`MagpieForestBaseline` — a random forest on matminer's magpie composition
  features (Ward et al., npj Comput. Mater. 2, 16028 (2016)): what a user would
  otherwise build.

The formula-based baselines read ``X`` as a sequence of chemical formulas, or a
DataFrame with a ``formula`` column.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from sklearn.base import BaseEstimator, ClassifierMixin

from prescreen.errors import InputError
from prescreen.validation import parse_formulas

__all__ = [
    "RandomBaseline",
    "BaseRateBaseline",
    "ElementLinearBaseline",
    "MagpieForestBaseline",
    "MAX_Z",
    "formula_column",
    "element_matrix",
    "magpie_features",
]

#: Elements up to this atomic number get a column in :class:`ElementLinearBaseline`
#: (103, lawrencium: the end of the actinides).
MAX_Z: int = 103


def formula_column(X: Any) -> list[str]:
    """The formulas of ``X``: a sequence of strings or a DataFrame ``formula`` column."""
    if isinstance(X, pd.DataFrame):
        if "formula" not in X.columns:
            raise InputError("table has no 'formula' column", value=list(X.columns)[:10], expected="a 'formula' column")
        X = X["formula"]
    values = list(np.asarray(X, dtype=object).ravel())
    for i, v in enumerate(values):
        if not isinstance(v, str):
            raise InputError("formula is not a string", line=i, value=v, expected="a chemical formula such as MoS2")
    return values


def _labels01(y: ArrayLike, *, need_both: bool = False) -> NDArray[np.int8]:
    y = np.asarray(y)
    if y.ndim != 1 or not np.all(np.isin(y, (0, 1))):
        raise InputError("labels must be a 1-D array of 0/1", value=np.unique(y)[:5].tolist(), expected="0/1")
    if need_both and len(np.unique(y)) < 2:
        raise InputError("cannot train on one class", value=np.unique(y).tolist(), expected="labels 0 and 1")
    return y.astype(np.int8)


def _two_columns(p: NDArray[np.float64]) -> NDArray[np.float64]:
    return np.column_stack([1.0 - p, p])


class RandomBaseline(ClassifierMixin, BaseEstimator):
    """Uniform random probability in ``[0, 1)``; reproducible for a given ``random_state``.

    Every call of :meth:`predict_proba` restarts from the seed drawn at fit time, so the
    same rows get the same scores.
    """

    def __init__(self, *, random_state: int | np.random.Generator | None = None) -> None:
        self.random_state = random_state

    def fit(self, X: Any, y: ArrayLike) -> "RandomBaseline":
        _labels01(y)
        self.classes_ = np.array([0, 1])
        self.seed_ = int(np.random.default_rng(self.random_state).integers(0, 2**63 - 1))
        return self

    def predict_proba(self, X: Any) -> NDArray[np.float64]:
        """Shape ``(n, 2)``."""
        return _two_columns(np.random.default_rng(self.seed_).random(len(X)))


class BaseRateBaseline(ClassifierMixin, BaseEstimator):
    """The training set's fraction of positives, for every row."""

    def fit(self, X: Any, y: ArrayLike) -> "BaseRateBaseline":
        self.classes_ = np.array([0, 1])
        self.base_rate_ = float(_labels01(y).mean())
        return self

    def predict_proba(self, X: Any) -> NDArray[np.float64]:
        """Shape ``(n, 2)``."""
        return _two_columns(np.full(len(X), self.base_rate_))


def element_matrix(formulas: Sequence[str], *, encoding: str = "fraction") -> NDArray[np.float64]:
    """Per-element encoding of formulas.

    Parameters
    ----------
    formulas
        Chemical formulas, length ``n``.
    encoding
        ``"fraction"``: atomic fraction of each element; ``"onehot"``: 1 if present.

    Returns
    -------
    ndarray of shape (n, MAX_Z)
        Column ``Z - 1`` belongs to the element of atomic number ``Z``.
    """
    if encoding not in ("fraction", "onehot"):
        raise InputError("unknown element encoding", value=encoding, expected="'fraction' or 'onehot'")
    comps = parse_formulas(formulas)
    out = np.zeros((len(comps), MAX_Z))
    for i, comp in enumerate(comps):
        total = comp.num_atoms
        for el, amount in comp.items():
            z = el.Z
            if z > MAX_Z:
                raise InputError("element beyond lawrencium", line=i, value=str(el), expected=f"Z <= {MAX_Z}")
            out[i, z - 1] = 1.0 if encoding == "onehot" else amount / total
    return out


class ElementLinearBaseline(ClassifierMixin, BaseEstimator):
    """Logistic regression on per-element atomic fractions (or presence).

    Parameters
    ----------
    encoding
        ``"fraction"`` or ``"onehot"`` (see :func:`element_matrix`).
    C
        Inverse L2 regularisation strength of the logistic regression.
    """

    def __init__(self, *, encoding: str = "fraction", C: float = 1.0) -> None:
        self.encoding = encoding
        self.C = C

    def fit(self, X: Any, y: ArrayLike) -> "ElementLinearBaseline":
        from sklearn.linear_model import LogisticRegression

        y01 = _labels01(y, need_both=True)
        self.classes_ = np.array([0, 1])
        self.model_ = LogisticRegression(C=self.C, max_iter=5000)
        self.model_.fit(element_matrix(formula_column(X), encoding=self.encoding), y01)
        return self

    def predict_proba(self, X: Any) -> NDArray[np.float64]:
        """Shape ``(n, 2)``."""
        return self.model_.predict_proba(element_matrix(formula_column(X), encoding=self.encoding))


def magpie_features(formulas: Sequence[str]) -> pd.DataFrame:
    """matminer's magpie ``ElementProperty`` features (132 columns) of formulas.

    Computed once per distinct formula with matminer itself (the reference
    implementation; Ward et al., npj Comput. Mater. 2, 16028 (2016)).

    Returns
    -------
    pandas.DataFrame
        Shape ``(n, 132)``, columns ``ElementProperty.feature_labels()``.
    """
    from matminer.featurizers.composition import ElementProperty

    featuriser = ElementProperty.from_preset("magpie")
    comps = parse_formulas(formulas)
    rows: dict[int, list[float]] = {}
    values = []
    for comp in comps:
        key = id(comp)  # equal formulas share one Composition object
        if key not in rows:
            rows[key] = featuriser.featurize(comp)
        values.append(rows[key])
    return pd.DataFrame(np.asarray(values, dtype=np.float64), columns=featuriser.feature_labels())


class MagpieForestBaseline(ClassifierMixin, BaseEstimator):
    """Random forest on matminer's magpie composition features.

    Parameters
    ----------
    n_estimators
        Trees in the forest.
    min_samples_leaf
        Minimum rows per leaf.
    random_state
        Seed or generator.
    n_jobs
        Threads for the forest.
    """

    def __init__(
        self,
        *,
        n_estimators: int = 300,
        min_samples_leaf: int = 1,
        random_state: int | np.random.Generator | None = None,
        n_jobs: int | None = None,
    ) -> None:
        self.n_estimators = n_estimators
        self.min_samples_leaf = min_samples_leaf
        self.random_state = random_state
        self.n_jobs = n_jobs

    def fit(self, X: Any, y: ArrayLike) -> "MagpieForestBaseline":
        from sklearn.ensemble import RandomForestClassifier

        y01 = _labels01(y, need_both=True)
        self.classes_ = np.array([0, 1])
        seed = int(np.random.default_rng(self.random_state).integers(0, 2**31 - 1))
        self.model_ = RandomForestClassifier(
            n_estimators=self.n_estimators,
            min_samples_leaf=self.min_samples_leaf,
            random_state=seed,
            n_jobs=self.n_jobs,
        )
        self.model_.fit(magpie_features(formula_column(X)).to_numpy(), y01)
        return self

    def predict_proba(self, X: Any) -> NDArray[np.float64]:
        """Shape ``(n, 2)``."""
        return self.model_.predict_proba(magpie_features(formula_column(X)).to_numpy())
