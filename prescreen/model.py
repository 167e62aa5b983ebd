"""The high-spillage classifier: a calibrated LightGBM ensemble with an uncertainty.

:class:`SpillageClassifier` follows the scikit-learn estimator contract. It learns the
probability that a candidate's spin-orbit spillage is at or above the hit threshold
(:data:`prescreen.SPILLAGE_THRESHOLD`) from a numeric feature table, and reports the
spread of that probability across an ensemble of gradient-boosted tree models.

How a fit works
---------------
1. **Out-of-fold scores.** The training rows are split into ``calibration_cv`` folds
   (by group with :class:`~sklearn.model_selection.StratifiedGroupKFold` when ``groups``
   is given, so polymorphs never calibrate each other; else stratified). One booster per
   fold is trained on the other folds and scores the held-out fold, giving one honest
   raw score (log-odds margin) per training row.
2. **Calibration.** A one-dimensional map from margin to probability is fitted to those
   out-of-fold margins against the labels with the *original* sample weights (class
   balancing is only used to grow the trees, so the calibrated probability reflects the
   true base rate). ``"sigmoid"`` is Platt scaling (Platt 1999); ``"isotonic"`` is
   isotonic regression (Zadrozny and Elkan 2002). ``"auto"`` measures both — see
   :data:`ISOTONIC_MIN_POSITIVES` and :meth:`SpillageClassifier.fit` for the rule.
3. **Ensemble.** ``n_models`` boosters are trained on all rows, each with its own seed
   for row bagging (``subsample``) and feature sampling (``colsample``). The calibration
   map is applied to every member; the mean over members is :meth:`predict_proba`, the
   standard deviation is the uncertainty.

This is the "one calibrator for the final model" scheme of scikit-learn's
``CalibratedClassifierCV(ensemble=False)``, extended to an ensemble of seeds.

:class:`SpillageRegressor` is the optional regression head: the same ensemble fitted
to the spillage value, with the same spread and the same model files.

A training set with only one class is refused with an :class:`~prescreen.errors.InputError`
(a ``ValueError``): a model that has never seen a hit cannot say how likely one is.

Model files
-----------
:meth:`SpillageClassifier.save` writes a folder with one LightGBM text model per member
(``member_00.txt`` ...) and ``metadata.json`` (feature names, feature schema and its
SHA-256, package versions, training-data hash, metrics, threshold, hyperparameters and
the calibration map as plain numbers, plus the SHA-256 of every member file). Nothing is
pickled. Saving a loaded model reproduces the files byte for byte.

References
----------
J. Platt, "Probabilistic outputs for support vector machines and comparisons to
regularized likelihood methods", Advances in Large Margin Classifiers (1999).
B. Zadrozny and C. Elkan, "Transforming classifier scores into accurate multiclass
probability estimates", KDD (2002).
A. Niculescu-Mizil and R. Caruana, "Predicting good probabilities with supervised
learning", ICML (2005).
"""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from importlib import metadata as importlib_metadata
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin
from sklearn.isotonic import IsotonicRegression
from sklearn.model_selection import StratifiedGroupKFold, StratifiedKFold
from sklearn.utils.multiclass import check_classification_targets
from sklearn.utils.validation import check_is_fitted, validate_data

from prescreen.errors import InputError, SchemaMismatchError
from prescreen.io.atomic import write_bytes, write_text

__all__ = [
    "SpillageClassifier",
    "SpillageRegressor",
    "Calibrator",
    "training_data_hash",
    "MODEL_FORMAT",
    "ISOTONIC_MIN_POSITIVES",
    "SCORE_CHUNK_ROWS",
    "MAX_BIN",
    "MIN_LEAF_HESSIAN",
]

#: Identifier written into every model file; bumped when the layout changes.
MODEL_FORMAT: str = "prescreen-model/1"

#: With ``calibration="auto"`` isotonic regression is only considered when the training
#: set holds at least this many positive rows. Isotonic regression is a step function
#: with one free level per block and overfits small calibration sets, where Platt's two
#: parameters do better (Niculescu-Mizil and Caruana, ICML 2005, found isotonic behind
#: Platt below roughly a thousand calibration rows — from memory). The exact count is
#: common practice, not a published bound.
ISOTONIC_MIN_POSITIVES: int = 100

#: Rows scored per block when predicting; LightGBM's working memory then stays bounded
#: whatever the number of rows (the output itself is ``n_models * n * 8`` bytes).
SCORE_CHUNK_ROWS: int = 131_072

#: Histogram bins per feature. LightGBM's default is 255; 63 halved the fit time on
#: 10,000 x 176 features here (1.78 -> 0.91 CPU s per booster) and is ample for a few
#: thousand labelled rows (measured in this project, not a published value).
MAX_BIN: int = 63

#: Smallest summed hessian in a leaf (LightGBM's default, 1e-3).
MIN_LEAF_HESSIAN: float = 1e-3

#: Folds of the nested comparison of Platt against isotonic under ``"auto"``.
_AUTO_FOLDS: int = 5

#: Platt's margin-to-probability fit stops at this gradient norm (dimensionless).
_PLATT_GTOL: float = 1e-10

_CALIBRATIONS = ("auto", "isotonic", "sigmoid", None)
_CLASS_WEIGHTS = ("balanced", None)
_METADATA = "metadata.json"


# --------------------------------------------------------------------------- calibrators
@dataclass(frozen=True)
class Calibrator:
    """A monotone map from a booster's raw margin (log-odds) to a probability.

    Attributes
    ----------
    method
        ``"sigmoid"`` (Platt), ``"isotonic"`` or ``"identity"`` (plain logistic of the
        margin, used when calibration is switched off).
    params
        For ``"sigmoid"``: ``(a, b)`` with ``p = 1 / (1 + exp(-(a * margin + b)))``.
        For ``"isotonic"``: the knot margins followed by the knot probabilities, both of
        length ``m`` (so ``2 m`` numbers); values between knots are interpolated
        linearly and clipped at the ends. For ``"identity"``: empty.
    """

    method: str
    params: tuple[float, ...]

    def apply(self, margin: NDArray[np.float64]) -> NDArray[np.float64]:
        """Probability for each margin, shape of ``margin``."""
        margin = np.asarray(margin, dtype=np.float64)
        if self.method == "identity":
            return _expit(margin)
        if self.method == "sigmoid":
            a, b = self.params
            return _expit(a * margin + b)
        m = len(self.params) // 2
        knots_x = np.asarray(self.params[:m])
        knots_y = np.asarray(self.params[m:])
        return np.interp(margin, knots_x, knots_y)

    def to_dict(self) -> dict[str, Any]:
        return {"method": self.method, "params": [float(v) for v in self.params]}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "Calibrator":
        method = data["method"]
        if method not in ("identity", "sigmoid", "isotonic"):
            raise ValueError(f"unknown calibration method {method!r}")
        params = tuple(float(v) for v in data["params"])
        if method == "sigmoid" and len(params) != 2:
            raise ValueError("a sigmoid calibrator has exactly 2 parameters")
        if method == "isotonic" and (len(params) < 2 or len(params) % 2):
            raise ValueError("an isotonic calibrator has an even number (>= 2) of parameters")
        return cls(method=method, params=params)


def _expit(z: NDArray[np.float64]) -> NDArray[np.float64]:
    """Logistic function, written out so that the model file fixes the arithmetic."""
    return 1.0 / (1.0 + np.exp(-z))


def _fit_platt(margin: NDArray, y: NDArray, w: NDArray) -> Calibrator:
    """Platt scaling with Platt's smoothed targets, fitted by L-BFGS on weighted log loss."""
    from scipy.optimize import minimize

    pos = y == 1
    n_pos = float(w[pos].sum())
    n_neg = float(w[~pos].sum())
    # Platt (1999), eq. for the regularised targets: (N+ + 1)/(N+ + 2) and 1/(N- + 2).
    t = np.where(pos, (n_pos + 1.0) / (n_pos + 2.0), 1.0 / (n_neg + 2.0))

    def loss(ab: NDArray) -> tuple[float, NDArray]:
        z = ab[0] * margin + ab[1]
        # log(1 + exp(z)) - t z, stable for large |z|
        value = np.sum(w * (np.logaddexp(0.0, z) - t * z))
        r = w * (_expit(z) - t)
        return float(value), np.array([np.sum(r * margin), np.sum(r)])

    start = np.array([1.0, 0.0])
    # The slope is kept >= 0: a calibration map must not reverse the ensemble's ranking
    # (a negative fitted slope only means the out-of-fold margins carry no signal; the
    # map then flattens to the smoothed base rate).
    res = minimize(loss, start, jac=True, method="L-BFGS-B", bounds=[(0.0, None), (None, None)],
                   options={"gtol": _PLATT_GTOL})
    a, b = (float(v) for v in res.x)
    return Calibrator("sigmoid", (a, b))


def _fit_isotonic(margin: NDArray, y: NDArray, w: NDArray) -> Calibrator:
    iso = IsotonicRegression(y_min=0.0, y_max=1.0, increasing=True, out_of_bounds="clip")
    iso.fit(margin, y.astype(np.float64), sample_weight=w)
    knots_x = [float(v) for v in iso.X_thresholds_]
    knots_y = [float(v) for v in iso.y_thresholds_]
    if len(knots_x) == 1:  # a single knot: constant map, kept as two equal knots
        knots_x, knots_y = knots_x * 2, knots_y * 2
    return Calibrator("isotonic", tuple(knots_x + knots_y))


def _sample_weights(sample_weight: ArrayLike | None, n: int) -> NDArray[np.float64]:
    if sample_weight is None:
        return np.ones(n)
    w = np.asarray(sample_weight, dtype=np.float64)
    if w.ndim == 0:
        return np.full(n, float(w))
    if w.shape != (n,):
        raise InputError("sample_weight must have one entry per row", value=w.shape, expected=f"({n},)")
    if not np.all(np.isfinite(w)):
        raise InputError("sample_weight must be finite", line=int(np.argmin(np.isfinite(w))), expected="finite weights")
    return w


def _weighted_brier(p: NDArray, y: NDArray, w: NDArray) -> float:
    return float(np.sum(w * (p - y) ** 2) / np.sum(w))


# ------------------------------------------------------------------------------ hashing
def training_data_hash(X: pd.DataFrame | ArrayLike, y: ArrayLike, sample_weight: ArrayLike | None = None) -> str:
    """SHA-256 of a training table: column names, values (as float64) and labels.

    Parameters
    ----------
    X
        Feature table, shape ``(n, d)``; a DataFrame contributes its column names.
    y
        Labels, shape ``(n,)``.
    sample_weight
        Optional weights, shape ``(n,)``.

    Returns
    -------
    str
        ``"sha256:<hex>"``; equal tables give equal hashes on every platform that stores
        float64 in IEEE-754 little-endian order.
    """
    h = hashlib.sha256()
    if isinstance(X, pd.DataFrame):
        h.update(json.dumps([str(c) for c in X.columns]).encode())
    values = np.ascontiguousarray(np.asarray(X, dtype="<f8"))
    h.update(str(values.shape).encode())
    h.update(values.tobytes())
    h.update(json.dumps([str(v) for v in np.asarray(y).ravel()]).encode())
    if sample_weight is not None:
        h.update(np.ascontiguousarray(np.asarray(sample_weight, dtype="<f8")).tobytes())
    return "sha256:" + h.hexdigest()


def _plain(value: Any) -> Any:
    """numpy scalars to Python scalars, for JSON."""
    return value.item() if isinstance(value, np.generic) else value


def _sha256_bytes(data: bytes) -> str:
    return "sha256:" + hashlib.sha256(data).hexdigest()


def _package_versions() -> dict[str, str]:
    out = {}
    for name in ("prescreen", "lightgbm", "numpy", "scikit-learn", "scipy", "pandas"):
        try:
            out[name] = importlib_metadata.version(name)
        except importlib_metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


# ----------------------------------------------------------------------- shared machinery
class _BoostedEnsemble:
    """What the LightGBM ensembles share: parameter checks, parallel boosters, model files.

    A mixin for estimators that hold ``n_models``, ``n_estimators``, ``learning_rate``,
    ``num_leaves``, ``min_child_samples``, ``subsample``, ``colsample``,
    ``random_state`` and ``n_jobs``.
    """

    #: LightGBM objective of the members.
    _objective: str = "binary"

    def _check_params(self) -> None:
        integral = (int, np.integer)
        checks = [
            ("n_models", isinstance(self.n_models, integral) and self.n_models >= 1, "an int >= 1"),
            ("n_estimators", isinstance(self.n_estimators, integral) and self.n_estimators >= 1, "an int >= 1"),
            ("num_leaves", isinstance(self.num_leaves, integral) and self.num_leaves >= 2, "an int >= 2"),
            (
                "min_child_samples",
                isinstance(self.min_child_samples, integral) and self.min_child_samples >= 1,
                "an int >= 1",
            ),
            ("learning_rate", np.isscalar(self.learning_rate) and float(self.learning_rate) > 0, "a number > 0"),
            ("subsample", np.isscalar(self.subsample) and 0 < float(self.subsample) <= 1, "a number in (0, 1]"),
            ("colsample", np.isscalar(self.colsample) and 0 < float(self.colsample) <= 1, "a number in (0, 1]"),
            (
                "n_jobs",
                self.n_jobs is None or (isinstance(self.n_jobs, integral) and (self.n_jobs >= 1 or self.n_jobs == -1)),
                "None, -1 or an int >= 1",
            ),
            *self._extra_param_checks(),
        ]
        for name, ok, expected in checks:
            if not ok:
                raise InputError(
                    f"bad parameter {name} of {type(self).__name__}", value=getattr(self, name), expected=expected
                )

    def _extra_param_checks(self) -> list[tuple[str, bool, str]]:
        return []

    def _threads(self) -> int:
        if self.n_jobs is None:
            return 1
        if self.n_jobs == -1:
            return os.cpu_count() or 1
        return int(self.n_jobs)

    def _map(self, fn: Callable[[Any], Any], items: Sequence[Any]) -> list[Any]:
        """``[fn(item) for item in items]``, on ``n_jobs`` threads when more than one.

        LightGBM releases the GIL, so single-threaded boosters run side by side; this
        scales better than LightGBM's own OpenMP threads on a busy machine, where its
        spinning barriers lose most of the time (measured here: one booster on 2
        OpenMP threads took 17x longer than on 1 while other jobs shared the cores).
        """
        threads = min(self._threads(), len(items))
        if threads <= 1:
            return [fn(item) for item in items]
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=threads) as pool:
            return list(pool.map(fn, items))

    def _booster_params(self, seed: int) -> dict[str, Any]:
        return {
            "objective": self._objective,
            "learning_rate": float(self.learning_rate),
            "num_leaves": int(self.num_leaves),
            "min_data_in_leaf": int(self.min_child_samples),
            # LightGBM's default; 0 lets a leaf of near-certain rows (hessian ~ 0) split
            # into an empty child and abort training on small tables.
            "min_sum_hessian_in_leaf": MIN_LEAF_HESSIAN,
            "bagging_fraction": float(self.subsample),
            "bagging_freq": 1 if float(self.subsample) < 1.0 else 0,
            "feature_fraction": float(self.colsample),
            "bagging_seed": seed,
            "feature_fraction_seed": seed,
            "deterministic": True,
            "force_row_wise": True,
            "num_threads": 1,  # parallel over boosters instead, see _map
            "verbose": -1,
        }

    def _train_boosters(
        self, X: NDArray, y: NDArray, w: NDArray, jobs: Sequence[tuple[NDArray[np.intp] | None, int]]
    ) -> list[Any]:
        """One booster per ``(rows, seed)`` job (``rows=None``: all rows), in job order."""
        import lightgbm as lgb

        names = [f"f{i}" for i in range(X.shape[1])]  # LightGBM refuses some characters

        def train(job: tuple[NDArray[np.intp] | None, int]) -> lgb.Booster:
            rows, seed = job
            take = slice(None) if rows is None else rows
            ds = lgb.Dataset(
                X[take],
                label=y[take],
                weight=w[take],
                feature_name=names,
                params={"verbose": -1, "max_bin": MAX_BIN, "min_data_in_bin": 1},
                free_raw_data=True,
            )
            return lgb.train(self._booster_params(seed), ds, num_boost_round=int(self.n_estimators))

        return self._map(train, list(jobs))

    def _raw_members(self, X: pd.DataFrame | ArrayLike) -> NDArray[np.float64]:
        """Raw booster outputs of every member, shape ``(n_models, n)``, in row blocks."""
        check_is_fitted(self, "members_")
        X = validate_data(self, X, reset=False, dtype=[np.float64, np.float32], ensure_all_finite="allow-nan")
        out = np.empty((len(self.members_), X.shape[0]))
        for start in range(0, X.shape[0], SCORE_CHUNK_ROWS):
            block = X[start : start + SCORE_CHUNK_ROWS]
            raw = self._map(lambda b: b.predict(block, raw_score=True, num_threads=1), self.members_)
            out[:, start : start + len(block)] = np.stack(raw)
        return out

    # ---------------------------------------------------------------- model files
    def _params_as_json(self) -> dict[str, Any]:
        params = self.get_params()
        if not isinstance(self.random_state, (int, np.integer, type(None))):
            params["random_state"] = "generator"  # a Generator's state is not kept
        if isinstance(params.get("class_weight"), dict):
            params["class_weight"] = [[_plain(k), float(v)] for k, v in params["class_weight"].items()]
        return {k: _plain(v) for k, v in params.items()}

    def _write(
        self,
        path: str | Path,
        *,
        feature_schema: str,
        training_data_hash: str | None,
        metrics: dict | None,
        extra: dict[str, Any],
    ) -> None:
        check_is_fitted(self, "members_")
        if not isinstance(feature_schema, str) or not feature_schema:
            raise InputError("feature_schema must be a non-empty string", value=feature_schema)
        path = Path(path)
        path.mkdir(parents=True, exist_ok=True)
        member_files = []
        for i, booster in enumerate(self.members_):
            name = f"member_{i:02d}.txt"
            text = booster.model_to_string(num_iteration=-1).encode()
            write_bytes(path / name, text)
            member_files.append({"file": name, "sha256": _sha256_bytes(text)})
        written = {entry["file"] for entry in member_files}
        for stale in path.glob("member_*.txt"):  # members of an earlier, larger save
            if stale.name not in written:
                stale.unlink()
        names = getattr(self, "feature_names_in_", None)
        meta = {
            "format": MODEL_FORMAT,
            "estimator": type(self).__name__,
            "feature_schema": feature_schema,
            "feature_schema_sha256": _sha256_bytes(feature_schema.encode()),
            "feature_names": None if names is None else [str(n) for n in names],
            "n_features_in": int(self.n_features_in_),
            "training_data_hash": training_data_hash,
            "metrics": metrics,
            "params": self._params_as_json(),
            "members": member_files,
            "package_versions": _package_versions(),
        } | extra
        text = json.dumps(meta, indent=2, sort_keys=True, allow_nan=False) + "\n"
        write_text(path / _METADATA, text)  # last: it names the members' hashes

    @classmethod
    def _read(cls, path: str | Path, expected_schema: str | None) -> tuple[Any, dict[str, Any], Path]:
        """The model with its common state set, its metadata and the metadata path."""
        import lightgbm as lgb

        path = Path(path)
        if path.name == _METADATA:
            path = path.parent
        meta_path = path / _METADATA
        try:
            meta = json.loads(meta_path.read_text(encoding="utf-8"))
        except FileNotFoundError as exc:
            raise InputError("no model here", path=meta_path, expected=f"a folder written by {cls.__name__}.save") from exc
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise InputError(f"model metadata is not valid JSON: {exc}", path=meta_path) from exc
        if not isinstance(meta, dict) or meta.get("format") != MODEL_FORMAT:
            raise InputError(
                "unknown model file format",
                path=meta_path,
                value=meta.get("format") if isinstance(meta, dict) else type(meta).__name__,
                expected=MODEL_FORMAT,
            )
        if meta.get("estimator") != cls.__name__:
            raise InputError(
                "the model file holds another kind of model",
                path=meta_path,
                value=meta.get("estimator"),
                expected=cls.__name__,
            )
        schema = meta.get("feature_schema")
        if expected_schema is not None and schema != expected_schema:
            raise SchemaMismatchError(
                f"{meta_path}: the model was trained on feature schema {schema!r} but the "
                f"featurisers in use have schema {expected_schema!r}; retrain the model or "
                "use the featuriser version it was trained with"
            )
        try:
            params = dict(meta["params"])
            if params.get("random_state") == "generator":
                params["random_state"] = None
            if isinstance(params.get("class_weight"), list):  # saved as [label, factor] pairs
                params["class_weight"] = {label: factor for label, factor in params["class_weight"]}
            model = cls(**params)
            model.n_features_in_ = int(meta["n_features_in"])
            if meta["feature_names"] is not None:
                model.feature_names_in_ = np.asarray(meta["feature_names"], dtype=object)
            members = []
            for entry in meta["members"]:
                member_path = path / entry["file"]
                data = member_path.read_bytes()
                if _sha256_bytes(data) != entry["sha256"]:
                    raise InputError(
                        "model member does not match the checksum in metadata.json",
                        path=member_path,
                        value=_sha256_bytes(data),
                        expected=entry["sha256"],
                    )
                members.append(lgb.Booster(model_str=data.decode()))
            model.members_ = members
        except InputError:
            raise
        except (KeyError, TypeError, ValueError, OSError) as exc:
            raise InputError(f"damaged model file: {type(exc).__name__}: {exc}", path=meta_path) from exc
        model.metadata_ = meta
        return model, meta, meta_path


# ---------------------------------------------------------------------------- estimator
class SpillageClassifier(ClassifierMixin, _BoostedEnsemble, BaseEstimator):
    """Calibrated probability of high spillage from a LightGBM ensemble, with spread.

    Parameters
    ----------
    n_models
        Ensemble members (boosters with different bagging/feature-sampling seeds).
    n_estimators
        Boosting rounds per member.
    learning_rate
        Shrinkage per round.
    num_leaves
        Maximum leaves per tree.
    min_child_samples
        Minimum rows in a leaf (LightGBM ``min_data_in_leaf``).
    subsample
        Fraction of rows drawn (without replacement) for every tree; ``1.0`` switches
        row bagging off.
    colsample
        Fraction of features drawn for every tree.
    calibration
        ``"auto"``, ``"isotonic"``, ``"sigmoid"`` (Platt) or ``None`` (logistic of the
        raw margin; miscalibrated when ``class_weight="balanced"``).
    calibration_cv
        Folds used to produce the out-of-fold margins the calibrator is fitted to
        (reduced to the number of rows of the rarer class, or of groups, when smaller).
    class_weight
        ``"balanced"`` weights each class by ``total / (2 * class total)`` while growing
        trees; a dict ``{label: factor}`` multiplies the weights of that class; ``None``
        uses the sample weights as given. Class weights only shape the trees: the
        calibrator is fitted with the original weights.
    random_state
        Seed (int), ``numpy.random.Generator`` or ``None``; every seed used in the fit is
        drawn from one generator made from it.
    n_jobs
        Boosters trained or evaluated at the same time, each on one LightGBM thread;
        ``None`` means 1, ``-1`` means all cores. Results do not depend on it.

    Attributes
    ----------
    classes_ : ndarray of shape (2,)
        The two labels; ``classes_[1]`` is the positive ("high spillage") class.
    n_features_in_ : int
    feature_names_in_ : ndarray of str, shape (n_features_in_,)
        Only when ``X`` was a DataFrame with string column names.
    members_ : list of lightgbm.Booster, length n_models
    calibrators_ : list of Calibrator, length n_models
        The map applied to each member's margin (the same map for every member).
    calibration_method_ : str
        The method in use after the ``"auto"`` choice (``"identity"`` when off).
    calibration_scores_ : dict
        Held-out Brier score of each method tried by the ``"auto"`` rule.
    """

    def __init__(  # noqa: PLR0913 - scikit-learn estimators take their settings here
        self,
        *,
        n_models: int = 5,
        n_estimators: int = 150,
        learning_rate: float = 0.08,
        num_leaves: int = 15,
        min_child_samples: int = 10,
        subsample: float = 0.8,
        colsample: float = 0.5,
        calibration: str | None = "auto",
        calibration_cv: int = 5,
        class_weight: str | None = "balanced",
        random_state: int | np.random.Generator | None = None,
        n_jobs: int | None = None,
    ) -> None:
        self.n_models = n_models
        self.n_estimators = n_estimators
        self.learning_rate = learning_rate
        self.num_leaves = num_leaves
        self.min_child_samples = min_child_samples
        self.subsample = subsample
        self.colsample = colsample
        self.calibration = calibration
        self.calibration_cv = calibration_cv
        self.class_weight = class_weight
        self.random_state = random_state
        self.n_jobs = n_jobs

    def __sklearn_tags__(self):  # noqa: D105 - scikit-learn hook
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True  # LightGBM routes missing features itself
        tags.classifier_tags.multi_class = False
        return tags

    def _extra_param_checks(self) -> list[tuple[str, bool, str]]:
        return [
            (
                "calibration_cv",
                isinstance(self.calibration_cv, (int, np.integer)) and self.calibration_cv >= 2,
                "an int >= 2",
            ),
            ("calibration", self.calibration in _CALIBRATIONS, "one of 'auto', 'isotonic', 'sigmoid', None"),
            (
                "class_weight",
                isinstance(self.class_weight, dict) or self.class_weight in _CLASS_WEIGHTS,
                "'balanced', None or a dict {label: weight}",
            ),
        ]

    # ------------------------------------------------------------------------- fit
    def fit(
        self,
        X: pd.DataFrame | ArrayLike,
        y: ArrayLike,
        *,
        sample_weight: ArrayLike | None = None,
        groups: ArrayLike | None = None,
    ) -> "SpillageClassifier":
        """Fit the ensemble and its calibration.

        Parameters
        ----------
        X
            Feature table, shape ``(n, d)``; NaN marks a missing feature.
        y
            Labels, shape ``(n,)``, exactly two distinct values (normally 0/1 for
            spillage below/at-or-above the threshold); the larger is the positive class.
        sample_weight
            Non-negative row weights, shape ``(n,)``.
        groups
            Group label per row, shape ``(n,)`` (e.g. chemical system); when given the
            calibration folds keep every group on one side.

        Returns
        -------
        SpillageClassifier
            ``self``.

        Raises
        ------
        InputError
            One class only (after dropping zero-weight rows), more than two classes,
            negative weights, or bad parameters.

        Notes
        -----
        The ``"auto"`` rule: the out-of-fold margins are split again into
        ``min(5, calibration_cv)`` folds (by group when given); Platt and isotonic maps
        are fitted on the inner training part and scored by weighted Brier score on
        the inner held-out part. Isotonic is chosen only when it has the strictly lower
        held-out Brier score *and* the training set holds at least
        :data:`ISOTONIC_MIN_POSITIVES` positive rows; otherwise Platt.
        """
        self._check_params()
        X, y = validate_data(self, X, y, dtype=[np.float64, np.float32], ensure_all_finite="allow-nan")
        check_classification_targets(y)
        classes = np.unique(y)
        if len(classes) > 2:
            raise InputError(
                f"Only binary classification is supported. {type(self).__name__} got more than two labels",
                value=classes.tolist()[:10],
                expected="two label values (0/1: spillage below / at or above the threshold)",
            )
        w = _sample_weights(sample_weight, X.shape[0])
        if np.any(w < 0):
            raise InputError("negative sample weight", line=int(np.argmin(w)), value=float(w.min()), expected=">= 0")
        if not np.any(w > 0):
            raise InputError("all sample weights are zero", expected="at least one row with weight > 0")
        present = np.unique(y[w > 0])
        if len(present) < 2:
            raise InputError(
                "cannot train on one class: the training set (rows with weight > 0) has only "
                f"the label {present.tolist()}; a model that never saw both outcomes cannot "
                "give a probability",
                value=present.tolist(),
                expected="rows of both classes (spillage below and at/above the threshold)",
            )
        self.classes_ = classes
        y01 = (y == classes[1]).astype(np.int8)
        group_arr = None if groups is None else np.asarray(groups)
        if group_arr is not None and group_arr.shape != (X.shape[0],):
            raise InputError("groups must have one entry per row", value=group_arr.shape, expected=f"({X.shape[0]},)")

        rng = np.random.default_rng(self.random_state)
        tree_w = w.copy()
        if self.class_weight == "balanced":
            totals = np.array([w[y01 == 0].sum(), w[y01 == 1].sum()])
            tree_w = w * (totals.sum() / (2.0 * totals))[y01]
        elif isinstance(self.class_weight, dict):
            unknown = set(self.class_weight) - set(classes.tolist())
            if unknown:
                raise InputError(
                    "class_weight names labels that are not in y",
                    value=sorted(unknown, key=str),
                    expected=f"keys among {classes.tolist()}",
                )
            factors = np.array([float(self.class_weight.get(c, 1.0)) for c in classes])
            tree_w = w * factors[y01]

        # every booster (one per calibration fold, then the members) is independent:
        # draw all seeds first, then train them side by side
        folds = [] if self.calibration is None else self._calibration_folds(
            y01, w, group_arr, int(self.calibration_cv), rng
        )
        fold_seeds = rng.integers(1, 2**31 - 1, size=len(folds))
        member_seeds = rng.integers(1, 2**31 - 1, size=int(self.n_models))
        jobs = [(tr, int(s)) for (tr, _), s in zip(folds, fold_seeds)] + [(None, int(s)) for s in member_seeds]
        boosters = self._train_boosters(X, y01, tree_w, jobs)
        self.members_ = boosters[len(folds) :]

        if self.calibration is None:
            calibrator = Calibrator("identity", ())
            self.calibration_scores_ = {}
        else:  # out-of-fold margins of the fold boosters -> calibration map
            oof = np.full(X.shape[0], np.nan)
            margins = self._map(
                lambda pair: pair[0].predict(X[pair[1]], raw_score=True, num_threads=1),
                [(booster, te) for booster, (_, te) in zip(boosters, folds)],
            )
            for (_, te), margin in zip(folds, margins):
                oof[te] = margin
            calibrator = self._choose_calibrator(oof, y01, w, group_arr, rng)
        self.calibration_method_ = calibrator.method
        self.calibrators_ = [calibrator] * int(self.n_models)
        return self

    def _calibration_folds(
        self, y01: NDArray, w: NDArray, groups: NDArray | None, n_splits: int, rng: np.random.Generator
    ) -> list[tuple[NDArray[np.intp], NDArray[np.intp]]]:
        pos = w > 0
        smallest = int(min(np.sum(pos & (y01 == 0)), np.sum(pos & (y01 == 1))))
        seed = int(rng.integers(0, 2**31 - 1))
        X_dummy = np.zeros((len(y01), 1))
        if groups is not None:
            n_groups = len(np.unique(groups))
            k = min(n_splits, n_groups, smallest)
            if k < 2:
                raise InputError(
                    "calibration by grouped cross-validation needs at least 2 groups and "
                    "2 rows of each class (set calibration=None to skip it)",
                    value={"groups": n_groups, "rows in the rarer class": smallest},
                    expected=">= 2 distinct groups and >= 2 rows of each class",
                )
            splitter = StratifiedGroupKFold(n_splits=k, shuffle=True, random_state=seed)
            return list(splitter.split(X_dummy, y01, groups))
        k = min(n_splits, smallest)
        if k < 2:
            raise InputError(
                "calibration by cross-validation needs at least 2 rows of each class "
                "(set calibration=None to skip it)",
                value=smallest,
                expected=">= 2 rows in the rarer class",
            )
        splitter = StratifiedKFold(n_splits=k, shuffle=True, random_state=seed)
        return list(splitter.split(X_dummy, y01))

    def _choose_calibrator(
        self, margin: NDArray, y01: NDArray, w: NDArray, groups: NDArray | None, rng: np.random.Generator
    ) -> Calibrator:
        if self.calibration == "sigmoid":
            self.calibration_scores_ = {}
            return _fit_platt(margin, y01, w)
        if self.calibration == "isotonic":
            self.calibration_scores_ = {}
            return _fit_isotonic(margin, y01, w)
        # "auto": measure both on held-out out-of-fold margins
        scores = {"sigmoid": 0.0, "isotonic": 0.0}
        folds = self._calibration_folds(y01, w, groups, min(_AUTO_FOLDS, int(self.calibration_cv)), rng)
        total = float(np.sum(w))
        for tr, te in folds:
            for name, fitter in (("sigmoid", _fit_platt), ("isotonic", _fit_isotonic)):
                cal = fitter(margin[tr], y01[tr], w[tr])
                scores[name] += _weighted_brier(cal.apply(margin[te]), y01[te], w[te]) * float(np.sum(w[te])) / total
        self.calibration_scores_ = scores
        n_pos = int(np.sum((y01 == 1) & (w > 0)))
        if n_pos >= ISOTONIC_MIN_POSITIVES and scores["isotonic"] < scores["sigmoid"]:
            return _fit_isotonic(margin, y01, w)
        return _fit_platt(margin, y01, w)

    # -------------------------------------------------------------------- predict
    def ensemble_proba(self, X: pd.DataFrame | ArrayLike) -> NDArray[np.float64]:
        """Calibrated probability of the positive class from every member.

        Parameters
        ----------
        X
            Feature table, shape ``(n, d)`` with the training columns.

        Returns
        -------
        ndarray of shape (n_models, n)
            One row per member (Thompson sampling draws from these).
        """
        raw = self._raw_members(X)
        return np.stack([cal.apply(margin) for cal, margin in zip(self.calibrators_, raw)])

    def predict_uncertainty(self, X: pd.DataFrame | ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Mean and spread of the calibrated probability over the ensemble.

        Returns
        -------
        mean : ndarray of shape (n,)
            Equal to ``predict_proba(X)[:, 1]``.
        std : ndarray of shape (n,)
            Population standard deviation across members (0 for ``n_models=1``).
        """
        members = self.ensemble_proba(X)
        return members.mean(axis=0), members.std(axis=0)

    def predict_proba(self, X: pd.DataFrame | ArrayLike) -> NDArray[np.float64]:
        """Calibrated class probabilities, shape ``(n, 2)``; column 1 is "high spillage"."""
        p = self.ensemble_proba(X).mean(axis=0)
        return np.column_stack([1.0 - p, p])

    def predict(self, X: pd.DataFrame | ArrayLike) -> NDArray:
        """The more probable label, shape ``(n,)`` (ties go to ``classes_[0]``)."""
        check_is_fitted(self, "members_")
        return self.classes_[np.argmax(self.predict_proba(X), axis=1)]

    # ---------------------------------------------------------------- model files
    def save(
        self,
        path: str | Path,
        *,
        feature_schema: str,
        training_data_hash: str | None = None,
        metrics: dict | None = None,
        threshold: float = 0.5,
        min_gap_eV: float | None = None,
    ) -> None:
        """Write the model as a folder of LightGBM text models plus ``metadata.json``.

        Parameters
        ----------
        path
            Folder to write (created; model files of an earlier save are replaced,
            other files are left alone).
        feature_schema
            Version string of the featurisers that produced the training columns.
        training_data_hash
            For example :func:`training_data_hash` of the training table.
        metrics
            JSON-serialisable validation metrics to keep with the model.
        threshold
            Spillage value that defined the positive label.
        min_gap_eV
            Band gap with spin-orbit coupling (eV) a positive also needed; None when the
            spillage alone defined the label.

        Notes
        -----
        No timestamps are written, so saving a loaded model gives identical bytes.
        """
        check_is_fitted(self, "members_")
        extra = {
            "classes": [_plain(c) for c in self.classes_],
            "threshold": float(threshold),
            "min_gap_eV": None if min_gap_eV is None else float(min_gap_eV),
            "calibration_method": self.calibration_method_,
            "calibration_scores": self.calibration_scores_,
            "calibrators": [c.to_dict() for c in self.calibrators_],
        }
        self._write(
            path, feature_schema=feature_schema, training_data_hash=training_data_hash, metrics=metrics, extra=extra
        )

    @classmethod
    def load(cls, path: str | Path, *, expected_schema: str | None = None) -> "SpillageClassifier":
        """Read a model folder written by :meth:`save`.

        Parameters
        ----------
        path
            The model folder (or its ``metadata.json``).
        expected_schema
            Feature schema of the featurisers in use; a different schema in the file is
            refused.

        Raises
        ------
        SchemaMismatchError
            The file's feature schema differs from ``expected_schema``.
        InputError
            Missing or damaged files (bad JSON, unknown format, member checksum).
        """
        model, meta, meta_path = cls._read(path, expected_schema)
        try:
            model.classes_ = np.asarray(meta["classes"])
            model.calibration_method_ = meta["calibration_method"]
            model.calibration_scores_ = dict(meta["calibration_scores"])
            model.calibrators_ = [Calibrator.from_dict(c) for c in meta["calibrators"]]
            model.threshold_ = float(meta["threshold"])
            gap = meta.get("min_gap_eV")  # absent from files written before it existed
            model.min_gap_eV_ = None if gap is None else float(gap)
        except (KeyError, TypeError, ValueError) as exc:
            raise InputError(f"damaged model file: {type(exc).__name__}: {exc}", path=meta_path) from exc
        if len(model.members_) != len(model.calibrators_):
            raise InputError(
                "model has a different number of members and calibrators",
                path=meta_path,
                value=(len(model.members_), len(model.calibrators_)),
                expected="equal counts",
            )
        return model


class SpillageRegressor(RegressorMixin, _BoostedEnsemble, BaseEstimator):
    """Ensemble regression head on the spillage value itself, with spread.

    The same LightGBM ensemble as :class:`SpillageClassifier` (seeds for row bagging and
    feature sampling drawn from ``random_state``) with a squared-error objective. Useful
    where the size of the spillage matters, not only which side of the threshold it is
    on; the prediction is not clipped to the physical range.

    Parameters
    ----------
    n_models, n_estimators, learning_rate, num_leaves, min_child_samples, subsample, colsample, random_state, n_jobs
        As for :class:`SpillageClassifier`.

    Attributes
    ----------
    n_features_in_ : int
    feature_names_in_ : ndarray of str, shape (n_features_in_,)
    members_ : list of lightgbm.Booster, length n_models
    """

    _objective = "regression"

    def __init__(  # noqa: PLR0913 - scikit-learn estimators take their settings here
        self,
        *,
        n_models: int = 5,
        n_estimators: int = 150,
        learning_rate: float = 0.08,
        num_leaves: int = 15,
        min_child_samples: int = 10,
        subsample: float = 0.8,
        colsample: float = 0.5,
        random_state: int | np.random.Generator | None = None,
        n_jobs: int | None = None,
    ) -> None:
        self.n_models = n_models
        self.n_estimators = n_estimators
        self.learning_rate = learning_rate
        self.num_leaves = num_leaves
        self.min_child_samples = min_child_samples
        self.subsample = subsample
        self.colsample = colsample
        self.random_state = random_state
        self.n_jobs = n_jobs

    def __sklearn_tags__(self):  # noqa: D105 - scikit-learn hook
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        return tags

    def fit(
        self, X: pd.DataFrame | ArrayLike, y: ArrayLike, *, sample_weight: ArrayLike | None = None
    ) -> "SpillageRegressor":
        """Fit the ensemble.

        Parameters
        ----------
        X
            Feature table, shape ``(n, d)``; NaN marks a missing feature.
        y
            Spillage values, shape ``(n,)`` (dimensionless, normally in ``[0, 2]``).
        sample_weight
            Non-negative row weights, shape ``(n,)``.

        Returns
        -------
        SpillageRegressor
            ``self``.
        """
        self._check_params()
        X, y = validate_data(
            self,
            X,
            y,
            dtype=[np.float64, np.float32],
            ensure_all_finite="allow-nan",
            y_numeric=True,
            ensure_min_samples=2,
        )
        y = np.asarray(y, dtype=np.float64)
        w = _sample_weights(sample_weight, X.shape[0])
        if np.any(w < 0):
            raise InputError("negative sample weight", line=int(np.argmin(w)), value=float(w.min()), expected=">= 0")
        if not np.any(w > 0):
            raise InputError("all sample weights are zero", expected="at least one row with weight > 0")
        rng = np.random.default_rng(self.random_state)
        seeds = rng.integers(1, 2**31 - 1, size=int(self.n_models))
        self.members_ = self._train_boosters(X, y, w, [(None, int(s)) for s in seeds])
        return self

    def ensemble_predict(self, X: pd.DataFrame | ArrayLike) -> NDArray[np.float64]:
        """Predicted spillage of every member, shape ``(n_models, n)``."""
        return self._raw_members(X)

    def predict_uncertainty(self, X: pd.DataFrame | ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Mean and population standard deviation over members, each shape ``(n,)``."""
        members = self.ensemble_predict(X)
        return members.mean(axis=0), members.std(axis=0)

    def predict(self, X: pd.DataFrame | ArrayLike) -> NDArray[np.float64]:
        """Mean predicted spillage, shape ``(n,)``."""
        return self.ensemble_predict(X).mean(axis=0)

    def save(
        self,
        path: str | Path,
        *,
        feature_schema: str,
        training_data_hash: str | None = None,
        metrics: dict | None = None,
    ) -> None:
        """Write the model folder (see :meth:`SpillageClassifier.save`)."""
        self._write(path, feature_schema=feature_schema, training_data_hash=training_data_hash, metrics=metrics, extra={})

    @classmethod
    def load(cls, path: str | Path, *, expected_schema: str | None = None) -> "SpillageRegressor":
        """Read a model folder written by :meth:`save` (see :meth:`SpillageClassifier.load`)."""
        model, _, _ = cls._read(path, expected_schema)
        return model
