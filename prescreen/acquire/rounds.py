"""A campaign round: features -> model -> ranking -> proposal -> (DFT) -> ingest -> retrain.

This module joins the pieces of the library for one campaign; every step reads and
writes the campaign store and can be repeated without losing or duplicating work.

- :func:`candidate_features` featurises the campaign's candidates (cached by schema).
- :func:`training_table` joins the open labelled dataset (``data_open/``) with the
  campaign's own DFT results.
- :func:`train` fits the calibrated ensemble, validates it with grouped folds and
  records it in the store.
- :func:`rank` scores every candidate with probability, uncertainty, predicted cost
  and flags.
- :func:`propose` picks the next batch under a core-hour budget and writes
  ready-to-run structures.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from prescreen.errors import CampaignError, InputError
from prescreen.io.atomic import replacing, write_text

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

    from prescreen.campaign import Campaign
    from prescreen.model import SpillageClassifier

__all__ = [
    "DEFAULT_DATA_OPEN",
    "DEFAULT_MODEL_DIR",
    "PROPOSABLE_STATUSES",
    "TrainingTable",
    "TrainedModel",
    "ProposedRound",
    "data_open_dir",
    "load_open_labelled",
    "candidate_features",
    "training_table",
    "positive_rule",
    "train",
    "write_ranking",
    "load_model",
    "rank",
    "propose",
    "strategy_by_name",
    "cost_model",
    "cost_model_with_source",
    "cost_records",
    "cost_kpoints",
    "LabelOutcome",
    "label_pending",
    "replay_labelled",
]

_REPO = Path(__file__).resolve().parents[2]
#: The shipped open dataset (override with the PRESCREEN_DATA_OPEN environment variable).
DEFAULT_DATA_OPEN = _REPO / "data_open"
#: The shipped default model, trained on data_open/ (see scripts/train_default_model.py).
DEFAULT_MODEL_DIR = _REPO / "models" / "default"
#: Layer statuses a candidate may have and still be proposed for DFT.
PROPOSABLE_STATUSES = ("monolayer", "ambiguous")
#: Seed of every default model fit, so that a rerun gives the same model.
DEFAULT_SEED = 0


def data_open_dir(path: str | Path | None = None) -> Path:
    """The open-dataset folder: ``path``, else $PRESCREEN_DATA_OPEN, else the shipped one."""
    return Path(path or os.environ.get("PRESCREEN_DATA_OPEN") or DEFAULT_DATA_OPEN)


def load_open_labelled(path: str | Path | None = None) -> pd.DataFrame:
    """The labelled open dataset: one row per monolayer with ``structure`` objects.

    Returns
    -------
    pandas.DataFrame
        Index ``id``; columns ``formula`` (reduced), ``prototype``, ``spillage``,
        ``gap_soc_eV``, ``core_hours``, ``structure`` (pymatgen ``Structure``), ``n_atoms``.
    """
    import pandas as pd

    from prescreen.prototypes import structure_from_row

    folder = data_open_dir(path)
    table = folder / "labelled.parquet"
    if not table.is_file():
        raise CampaignError(f"{table}: the labelled open dataset is missing")
    df = pd.read_parquet(table)
    df = df[df["spillage"].notna()].copy()
    df["structure"] = [structure_from_row(row) for row in df.to_dict("records")]
    df = df.rename(columns={"reduced_formula": "formula"})
    keep = ["id", "formula", "prototype", "spillage", "gap_soc_eV", "core_hours", "n_atoms",
            "structure"]
    return df[keep].set_index("id")


def _featurise_frame(formulas: list[str], structures: list[Any], progress: bool) -> pd.DataFrame:
    from prescreen.featurise import featurise

    return featurise(formulas, structures, progress=progress)


def candidate_features(campaign: Campaign, *, progress: bool = True) -> pd.DataFrame:
    """Descriptors of every candidate of the campaign (cached by feature schema)."""
    from prescreen.featurise import schema_version

    def compute(ids: list[str], formulas: list[str], structures: list[Any]) -> pd.DataFrame:
        return _featurise_frame(formulas, structures, progress)

    return campaign.features(compute, schema_version())


@dataclass(frozen=True)
class TrainingTable:
    """Rows a model is trained on.

    Attributes
    ----------
    X : DataFrame, shape (n, d)
        Features (the ``error`` column removed).
    spillage : ndarray, shape (n,)
    y : ndarray of int, shape (n,)
        ``spillage >= threshold``, and ``gap_soc_eV >= min_gap_eV`` when a gap is
        required.
    weight : ndarray, shape (n,)
    formulas : list of str, length n
        For grouped validation folds.
    origin : ndarray of str, shape (n,)
        ``"open"`` or ``"campaign"``.
    core_hours : ndarray, shape (n,)
        Recorded cost of each label (NaN where the result did not say).
    gap_soc_eV : ndarray, shape (n,)
        Band gap with spin-orbit coupling (NaN where the result did not say).
    min_gap_eV : float or None
        The gap a positive needed (None: spillage alone decides).
    structures : list or None
        Each row's structure (None for a formula-only row), for the cost descriptors.
    """

    X: Any
    spillage: np.ndarray
    y: np.ndarray
    weight: np.ndarray
    formulas: list[str]
    origin: np.ndarray
    threshold: float
    core_hours: np.ndarray
    gap_soc_eV: np.ndarray
    min_gap_eV: float | None = None
    structures: list | None = None

    def __len__(self) -> int:
        return len(self.y)


def _feature_columns(frame: pd.DataFrame) -> pd.DataFrame:
    from prescreen.featurise import ERROR_COLUMN

    return frame.drop(columns=[ERROR_COLUMN], errors="ignore").astype(float)


def training_table(
    campaign: Campaign | None,
    *,
    use_open: bool = True,
    campaign_weight: float = 1.0,
    data_open: str | Path | None = None,
    threshold: float | None = None,
    campaign_filter: dict[str, str] | None = None,
    min_gap_eV: float | None = None,
    progress: bool = True,
) -> TrainingTable:
    """Join the open labelled data and the campaign's own results into one table.

    Parameters
    ----------
    campaign
        The campaign whose results are added (``None``: open data only).
    use_open
        Include ``data_open/``.
    campaign_weight
        Sample weight of the campaign's own rows relative to open rows (> 0); use a
        value above 1 to trust your own level of theory more.
    threshold
        Spillage counted as positive; default the campaign's (or 0.5).
    campaign_filter
        Keep only the campaign's results whose provenance matches every item, e.g.
        ``{"functional": "PBE"}``; keys among :data:`FILTER_KEYS`.
    min_gap_eV
        Count a row as positive only if its band gap with spin-orbit coupling is at least
        this (eV) as well: a high spillage in a metal comes from states crossing the
        Fermi level, not from an inversion across a gap. Every row then needs a
        ``gap_soc_eV``; rows without one are an error naming them.
    """
    import pandas as pd

    from prescreen import SPILLAGE_THRESHOLD

    if not campaign_weight > 0:
        raise InputError("the campaign weight (--campaign-weight) must be positive",
                         value=campaign_weight,
                         expected="a number > 0")
    if min_gap_eV is not None and not (np.isfinite(min_gap_eV) and min_gap_eV >= 0):
        raise InputError("min_gap_eV must be a finite number >= 0", value=min_gap_eV,
                         expected="a band gap in eV, e.g. 0.02")
    if threshold is None:
        threshold = campaign.threshold if campaign is not None else SPILLAGE_THRESHOLD
    parts, spill, weights, formulas, origin, hours, gaps = [], [], [], [], [], [], []
    structures: list[Any] = []
    where: list[str] = []  # each row's source, for error messages
    if use_open:
        open_df = load_open_labelled(data_open)
        feats = _feature_columns(_featurise_frame(list(open_df["formula"]),
                                                  list(open_df["structure"]), progress))
        feats.index = open_df.index
        parts.append(feats)
        spill.append(open_df["spillage"].to_numpy(float))
        gaps.append(open_df["gap_soc_eV"].to_numpy(float))
        hours.append(open_df["core_hours"].to_numpy(float))
        weights.append(np.ones(len(open_df)))
        formulas += list(open_df["formula"])
        structures += list(open_df["structure"])
        origin += ["open"] * len(open_df)
        where += [f"data_open/labelled.parquet:{i}" for i in open_df.index]
    if campaign is not None:
        labels = _filtered(campaign.labels(), campaign_filter or {})
        if len(labels):
            feats = _feature_columns(candidate_features(campaign, progress=progress))
            feats = feats.loc[labels.index]
            parts.append(feats)
            spill.append(labels["spillage"].to_numpy(float))
            gaps.append(pd.to_numeric(labels["gap_soc_eV"], errors="coerce").to_numpy(float))
            hours.append(pd.to_numeric(labels["core_hours"], errors="coerce").to_numpy(float))
            weights.append(np.full(len(labels), float(campaign_weight)))
            frame = campaign.candidates_frame()
            formulas += list(frame.loc[labels.index, "reduced_formula"])
            structures += [campaign.structure(cid) for cid in labels.index]
            origin += ["campaign"] * len(labels)
            where += [f"{src} ({cid})" for cid, src in labels["source"].items()]
    if not parts:
        raise CampaignError("no labelled data to train on: ingest results or use the open data")
    X = pd.concat(parts)
    spillage = np.concatenate(spill)
    gap = np.concatenate(gaps)
    y = spillage >= threshold
    if min_gap_eV is not None:
        missing = ~np.isfinite(gap)
        if missing.any():
            rows = [w for w, m in zip(where, missing) if m]
            shown = "; ".join(rows[:50]) + (f"; and {len(rows) - 50} more" if len(rows) > 50 else "")
            raise InputError(
                f"{len(rows)} labelled rows have no gap_soc_eV, needed to require a "
                f"gap of {min_gap_eV:g} eV: {shown}", value=len(rows),
                expected="a gap_soc_eV for every result (ingest the results again with that "
                "column: the gap completes the stored result), or no gap requirement")
        y &= gap >= min_gap_eV
    return TrainingTable(X=X, spillage=spillage, y=y.astype(int),
                         weight=np.concatenate(weights), formulas=formulas,
                         origin=np.asarray(origin), threshold=float(threshold),
                         core_hours=np.concatenate(hours), gap_soc_eV=gap,
                         min_gap_eV=None if min_gap_eV is None else float(min_gap_eV),
                         structures=structures)


def positive_rule(threshold: float, min_gap_eV: float | None = None) -> str:
    """What made a label positive, in words: ``"spillage >= 0.5"`` [``" and ... gap"``]."""
    rule = f"spillage >= {threshold:g}"
    if min_gap_eV is not None:
        rule += f" and band gap with SOC >= {min_gap_eV:g} eV"
    return rule


#: Provenance columns of a result that ``campaign_filter`` can select on.
FILTER_KEYS = ("functional", "code", "kmesh")


def _filtered(labels: pd.DataFrame, campaign_filter: dict[str, str]) -> pd.DataFrame:
    for key, value in campaign_filter.items():
        if key not in FILTER_KEYS:
            raise InputError("unknown result filter", value=key,
                             expected="one of " + ", ".join(FILTER_KEYS))
        present = sorted(labels[key].dropna().astype(str).unique())
        if str(value) not in present:
            raise InputError(f"no result has {key}={value}", value=value,
                             expected=f"one of the values present: {present}")
        labels = labels[labels[key].astype(str) == str(value)]
    return labels


@dataclass(frozen=True)
class TrainedModel:
    """A model written to disk and what it was validated at."""

    version: str
    path: Path
    n_rows: int
    n_positive: int
    metrics: dict[str, float]
    cv_table: Any  # pandas.DataFrame of grouped-CV metrics per fold


#: Rows per leaf: LightGBM's default of 10 on large tables, fewer on small ones so that a
#: table of a few dozen rows can still be split (common practice: about 5 % of the rows).
MAX_LEAF_ROWS = 10
MIN_LEAF_ROWS = 2


def leaf_rows(n_rows: int) -> int:
    """``min_child_samples`` used for a training table of ``n_rows`` rows."""
    return int(max(MIN_LEAF_ROWS, min(MAX_LEAF_ROWS, n_rows // 20)))


def _classifier(n_models: int, random_state: int, n_rows: int) -> SpillageClassifier:
    from prescreen.model import SpillageClassifier

    return SpillageClassifier(n_models=n_models, random_state=random_state, n_jobs=1,
                              min_child_samples=leaf_rows(n_rows))


#: Fewest folds worth reporting; with fewer rows of a class, validation is skipped.
MIN_CV_FOLDS = 2
#: Spread of training-set probabilities below which a model counts as constant.
CONSTANT_MODEL_TOL = 1e-9


def fit_and_validate(
    table: TrainingTable, *, n_models: int = 5, random_state: int = DEFAULT_SEED,
    n_splits: int = 5, progress: bool = True,
) -> tuple[SpillageClassifier, Any]:
    """Fit on the whole table and measure grouped k-fold metrics of the same recipe.

    The number of folds is lowered to the rows of the rarer class (or the number of
    chemistry groups) when those are fewer than ``n_splits``; below
    :data:`MIN_CV_FOLDS` no validation is run and the returned table is empty.
    """
    import warnings

    import pandas as pd

    from prescreen.errors import PrescreenWarning
    from prescreen.validation import cross_validate, formula_groups

    groups = formula_groups(table.formulas)
    n_pos = int(table.y.sum())
    n_neg = int(len(table.y) - n_pos)
    # Each training fold must keep two rows of each class for the model's own
    # calibration folds.
    folds = min(n_splits, min(n_pos, n_neg) // 2, len(set(groups.tolist())))
    n = len(table)
    if folds >= MIN_CV_FOLDS:
        cv = cross_validate(lambda: _classifier(n_models, random_state, n), table.X, table.y,
                            table.formulas, n_splits=folds, random_state=random_state,
                            progress=progress, label="grouped CV", sample_weight=table.weight)
    else:
        warnings.warn(f"too few labelled rows for grouped validation ({n_pos} positive, "
                      f"{n_neg} negative); the model is unvalidated", PrescreenWarning,
                      stacklevel=2)
        cv = pd.DataFrame()
    model = _classifier(n_models, random_state, n)
    model.fit(table.X, table.y, sample_weight=table.weight, groups=groups)
    if float(np.ptp(model.predict_proba(table.X)[:, 1])) < CONSTANT_MODEL_TOL:
        warnings.warn(f"the model gives every candidate the same probability ({n} labelled "
                      "rows are too few to learn from); rankings and proposals then follow "
                      "cost and diversity only", PrescreenWarning, stacklevel=2)
    return model, cv


def train(
    campaign: Campaign,
    *,
    use_open: bool = True,
    campaign_weight: float = 1.0,
    n_models: int = 5,
    random_state: int = DEFAULT_SEED,
    data_open: str | Path | None = None,
    campaign_filter: dict[str, str] | None = None,
    min_gap_eV: float | None = None,
    progress: bool = True,
) -> TrainedModel:
    """Train, validate and store a model for the campaign (a new version each call).

    See :func:`training_table` for ``use_open``, ``campaign_weight``,
    ``campaign_filter`` and ``min_gap_eV``; the settings are recorded with the model.
    """
    from prescreen.featurise import schema_version
    from prescreen.model import training_data_hash

    table = training_table(campaign, use_open=use_open, campaign_weight=campaign_weight,
                           data_open=data_open, campaign_filter=campaign_filter,
                           min_gap_eV=min_gap_eV, progress=progress)
    if len(set(table.y)) < 2:
        raise CampaignError(
            f"training data has only one class ({len(table)} rows, all "
            f"{'positive' if table.y[0] else 'negative'} at "
            f"{positive_rule(table.threshold, table.min_gap_eV)}); "
            "a classifier needs both"
        )
    model, cv = fit_and_validate(table, n_models=n_models, random_state=random_state,
                                 progress=progress)
    metrics = ({} if cv.empty else
               {k: float(v) for k, v in cv.loc["mean"].items() if np.isfinite(v)})
    n_models_before = campaign.status().models
    version = f"model-{n_models_before + 1:03d}"
    path = campaign.path / "models" / version
    model.save(path, feature_schema=schema_version(),
               training_data_hash=training_data_hash(table.X, table.y, table.weight),
               metrics=metrics, threshold=table.threshold, min_gap_eV=table.min_gap_eV)
    with replacing(path / "grouped_cv.csv") as tmp:
        cv.to_csv(tmp)
    campaign.record_model(version, path.relative_to(campaign.path),
                          feature_schema=schema_version(), training_rows=len(table),
                          metrics=metrics,
                          settings={"use_open": use_open, "campaign_weight": campaign_weight,
                                    "campaign_filter": campaign_filter or {},
                                    "min_gap_eV": min_gap_eV,
                                    "n_models": n_models, "random_state": random_state})
    return TrainedModel(version=version, path=path, n_rows=len(table),
                        n_positive=int(table.y.sum()), metrics=metrics, cv_table=cv)


def load_model(campaign: Campaign | None = None) -> tuple[SpillageClassifier, str]:
    """The campaign's latest model, else the shipped default; returns (model, version)."""
    from prescreen.featurise import schema_version
    from prescreen.model import SpillageClassifier

    record = campaign.latest_model() if campaign is not None else None
    if record is not None:
        path = campaign.path / record["path"]
        return SpillageClassifier.load(path, expected_schema=schema_version()), record["version"]
    if not (DEFAULT_MODEL_DIR / "metadata.json").is_file():
        raise CampaignError(
            f"no model: train one with `prescreen train` (the shipped default model "
            f"{DEFAULT_MODEL_DIR} is missing)"
        )
    return SpillageClassifier.load(DEFAULT_MODEL_DIR, expected_schema=schema_version()), "default"


#: Fewest recorded wall times the cost model is fitted to; below it the default shape
#: with its placeholder scale is used (see prescreen.acquire.cost).
MIN_COST_RECORDS = 5


def cost_kpoints(campaign: Campaign) -> dict[str, Any]:
    """How the campaign's cost descriptors count k-points: keyword arguments of
    :func:`prescreen.acquire.cost.descriptors_for_structure` for the mesh of its labeller
    (:meth:`Campaign.label_settings`: its explicit ``kpts``, else its density), so a
    campaign computed on a denser mesh gets proportionally larger predicted costs."""
    settings = campaign.label_settings()
    if settings.kpts is not None:
        return {"kmesh": settings.kpts}
    return {"kpoint_density": float(settings.kpt_density)}


def _cost_cache(kpoints: dict[str, Any]) -> str:
    """Name of the cost-descriptor cache for a mesh (the default density keeps the base)."""
    from prescreen.physics.dft import DEFAULT_KPT_DENSITY

    if "kmesh" in kpoints:
        return f"{COST_DESCRIPTOR_CACHE}-m{kpoints['kmesh'][0]}x{kpoints['kmesh'][1]}"
    density = kpoints["kpoint_density"]
    return COST_DESCRIPTOR_CACHE + ("" if density == DEFAULT_KPT_DENSITY else f"-k{density:g}")


#: What the built-in labeller appends to the ``code`` of a plane-wave result (its cost
#: scales like a plane-wave code's, not like LCAO's).
PW_CODE_SUFFIX = " (plane waves)"


def cost_records(campaign: Campaign, *, data_open: str | Path | None = None) -> pd.DataFrame:
    """Recorded core-hours with the cost descriptors of their structures.

    Rows come from the campaign's results that carry ``core_hours`` and a structure
    (k-points counted on the campaign's mesh, :func:`cost_kpoints`), and from the
    open dataset's labeller records (at the density they were computed with).
    """
    import pandas as pd

    from prescreen.acquire.cost import descriptors_for_structure

    rows = []
    labels = campaign.labels()
    kpoints = cost_kpoints(campaign)
    for cid, hours in labels["core_hours"].dropna().items():
        structure = campaign.structure(cid)
        if structure is not None and hours > 0:
            rows.append({**descriptors_for_structure(structure, **kpoints),
                         "core_hours": float(hours),
                         "origin": "campaign", "code": labels.loc[cid, "code"]})
    try:
        open_df = load_open_labelled(data_open)
    except CampaignError:
        open_df = None
    if open_df is not None:
        for structure, hours in zip(open_df["structure"], open_df["core_hours"]):
            if hours == hours and hours > 0:
                rows.append({**descriptors_for_structure(structure),
                             "core_hours": float(hours), "origin": "data_open",
                             "code": "GPAW"})
    return pd.DataFrame(rows)


def cost_model_with_source(campaign: Campaign, *,
                           data_open: str | Path | None = None) -> tuple[Any, str]:
    """The campaign's cost model and a sentence saying where it came from.

    In order of preference:

    1. ``<campaign>/cost_model.json`` (your own coefficients: write it with
       :meth:`prescreen.acquire.cost.CostModel.save`);
    2. fitted to the campaign's own results that record ``core_hours`` (your code and
       cluster), when there are at least :data:`MIN_COST_RECORDS`; LCAO-shaped when all
       of them came from GPAW's LCAO mode (the built-in labeller's default),
       plane-wave-shaped otherwise;
    3. the LCAO-shaped model fitted to the wall times the built-in labeller recorded for
       the open dataset, so predicted costs mean core-hours of the built-in labeller;
    4. the unfitted default (placeholder scale, see :mod:`prescreen.acquire.cost`).
    """
    from prescreen.acquire.cost import CostModel

    path = campaign.path / "cost_model.json"
    if path.is_file():
        return CostModel.load(path), f"your cost model in {path}"
    records = cost_records(campaign, data_open=data_open)
    if len(records):
        own = records[records["origin"] == "campaign"]
        if len(own) >= MIN_COST_RECORDS:
            codes = own["code"].fillna("")
            lcao = (codes.str.startswith("GPAW") & ~codes.str.endswith(PW_CODE_SUFFIX)).all()
            base = CostModel.for_code("lcao") if lcao else CostModel()
            shape = "LCAO" if lcao else "plane-wave"
            return base.fit(own.drop(columns=["code"])), (
                f"fitted ({shape} shape) to the core_hours of {len(own)} of this "
                "campaign's results")
        shipped = records[records["origin"] == "data_open"]
        if len(shipped) >= MIN_COST_RECORDS:
            return CostModel.for_code("lcao").fit(shipped.drop(columns=["code"])), (
                f"fitted (LCAO shape) to {len(shipped)} wall times the built-in labeller "
                "recorded for data_open/")
    return CostModel(), ("built-in default, not fitted: its scale is an assumption and its "
                         "interval a guess")


def cost_model(campaign: Campaign, *, data_open: str | Path | None = None):
    """The campaign's cost model (see :func:`cost_model_with_source`)."""
    return cost_model_with_source(campaign, data_open=data_open)[0]


#: Columns of :func:`prescreen.acquire.cost.descriptors_for_structure`, and the name of
#: their cache in the campaign (change the version when the descriptors change).
COST_DESCRIPTORS = ("n_electrons", "n_kpoints", "volume", "n_atoms", "area")
COST_DESCRIPTOR_CACHE = "cost-descriptors-1"


def rank(campaign: Campaign, *, progress: bool = True) -> pd.DataFrame:
    """Score every candidate: probability, uncertainty, predicted cost, flags and rank.

    Returns
    -------
    pandas.DataFrame
        Index ``id``, sorted by rank (1 = most likely high spillage). Columns:
        ``formula``, ``probability``, ``uncertainty`` (ensemble spread), ``rank``,
        ``cost_core_hours`` with ``cost_low``/``cost_high`` (NaN for formula-only
        candidates), ``layer_status``, ``duplicate_of``, ``hazard``, ``spillage`` (if
        labelled), ``flags`` (a readable summary), ``model``. ``attrs["positive_rule"]``
        says what the probability is the probability of (:func:`positive_rule`).
    """
    from prescreen.acquire.cost import descriptors_for_structure

    if not campaign.candidate_ids():
        raise CampaignError(f"{campaign.path}: the campaign has no candidates yet; add some "
                            f"with `prescreen add {campaign.path} <files or folders>`")
    model, version = load_model(campaign)
    feats = _feature_columns(candidate_features(campaign, progress=progress))
    mean, std = model.predict_uncertainty(feats)
    frame = campaign.candidates_frame()
    out = frame[["formula", "layer_status", "duplicate_of", "hazard", "spillage"]].copy()
    out["probability"] = mean
    out["uncertainty"] = std
    costs = cost_model(campaign)
    kpoints = cost_kpoints(campaign)

    def describe(ids: list[str], formulas: list[str], structures: list[Any]) -> pd.DataFrame:
        import pandas as pd

        return pd.DataFrame([descriptors_for_structure(st, **kpoints) if st is not None else {}
                             for st in structures], columns=COST_DESCRIPTORS, dtype=float)

    # cached in the campaign like the features: unpacking thousands of structures each
    # time would dominate a ranking; the name carries a mesh other than the default
    desc = campaign.features(describe, _cost_cache(kpoints))
    out["cost_core_hours"] = np.nan
    out["cost_low"] = np.nan
    out["cost_high"] = np.nan
    known = desc.dropna()
    if len(known):
        mid, low, high = costs.predict_interval(known)
        out.loc[known.index, "cost_core_hours"] = mid
        out.loc[known.index, "cost_low"] = low
        out.loc[known.index, "cost_high"] = high
    out["flags"] = [_flags(r) for r in out.itertuples()]
    out["model"] = version
    out = out.sort_values(["probability", "uncertainty"], ascending=[False, True], kind="stable")
    out.insert(0, "rank", np.arange(1, len(out) + 1))
    out.attrs["positive_rule"] = positive_rule(getattr(model, "threshold_", campaign.threshold),
                                               getattr(model, "min_gap_eV_", None))
    out.attrs.update(model_check(campaign, version))
    return out


#: Grouped-CV ROC-AUC below which `rank` warns that the ranking is close to random
#: (chosen here; 0.5 is random, and these folds are small).
WEAK_MODEL_ROC_AUC = 0.65


def write_ranking(table: pd.DataFrame, stem: str | Path) -> tuple[Path, Path]:
    """Write a :func:`rank` table as ``<stem>.csv`` and ``<stem>.parquet``, each whole.

    Returns
    -------
    (csv_path, parquet_path)
    """
    stem = Path(stem)
    stem.parent.mkdir(parents=True, exist_ok=True)
    paths = stem.with_suffix(".csv"), stem.with_suffix(".parquet")
    with replacing(paths[0]) as tmp:
        table.to_csv(tmp)
    with replacing(paths[1]) as tmp:
        table.to_parquet(tmp)
    return paths


def model_check(campaign: Campaign, version: str) -> dict[str, float]:
    """Grouped-CV ``cv_roc_auc`` (mean over folds) and ``cv_rows`` of model ``version``.

    From the campaign's model record, or from the shipped default model's metadata; an
    empty dict when neither records them.
    """
    if version == "default":
        meta = DEFAULT_MODEL_DIR / "metadata.json"
        metrics = json.loads(meta.read_text()).get("metrics") or {} if meta.is_file() else {}
    else:
        record = campaign.model_record(version)
        metrics = (record or {}).get("metrics") or {}
    try:
        return {"cv_roc_auc": float(metrics["roc_auc"]),
                "cv_rows": float(metrics["n_train"]) + float(metrics["n"])}
    except (KeyError, TypeError, ValueError):
        return {}


def _flags(row: Any) -> str:
    import pandas as pd

    flags = []
    if pd.notna(row.spillage):  # labelled: the known value beats any probability
        flags.append(f"labelled: spillage {row.spillage:.2f}")
    if row.layer_status not in ("monolayer", "formula_only"):
        flags.append(row.layer_status.replace("_", " "))
    if row.layer_status == "formula_only":
        flags.append("no structure")
    if isinstance(row.duplicate_of, str):
        flags.append(f"duplicate of {row.duplicate_of}")
    if row.hazard:
        flags.append(row.hazard)
    return "; ".join(flags)


def strategy_by_name(name: str, **options: Any):
    """The strategy function called ``name`` in :mod:`prescreen.acquire.strategies`."""
    from functools import partial

    from prescreen.acquire import strategies

    allowed = [n for n in strategies.__all__ if n[0].islower() and n != "two_phase"]
    if name not in allowed:
        why = ("two_phase is a schedule of two strategies over rounds, not one round's "
               "strategy: pick its explore or exploit strategy for this round"
               if name == "two_phase" else "unknown strategy")
        raise InputError(why, value=name, expected=", ".join(allowed))
    return partial(getattr(strategies, name), **options) if options else getattr(strategies, name)


#: Diversity weight of :func:`propose` for strategies that take one (chosen here).
DEFAULT_DIVERSITY = 0.3


def _strategy_options(name: str, diversity: float | None) -> dict[str, float]:
    """``{"diversity": w}`` if strategy ``name`` takes a diversity weight, else ``{}``."""
    import inspect

    takes = "diversity" in inspect.signature(strategy_by_name(name)).parameters
    if diversity is None:
        return {"diversity": DEFAULT_DIVERSITY} if takes else {}
    if not takes:
        raise InputError(f"strategy {name} takes no diversity weight", value=diversity,
                         expected="no diversity option with this strategy")
    from prescreen.acquire.strategies import check_diversity

    return {"diversity": check_diversity(diversity)}


@dataclass(frozen=True)
class ProposedRound:
    """A recorded round: its number, the proposal table and the folder of structures."""

    number: int
    table: Any  # pandas.DataFrame
    folder: Path
    expected_hits: float
    expected_hits_interval: tuple[float, float]
    total_cost: float
    budget: float
    strategy: str
    after: dict[str, Any]  # stop rule over the pool left after this batch


def propose(
    campaign: Campaign,
    *,
    budget_core_hours: float,
    strategy: str = "expected_hits_per_core_hour",
    diversity: float | None = None,
    seed: int = DEFAULT_SEED,
    ranking: pd.DataFrame | None = None,
    max_core_hours_per_hit: float | None = None,
    progress: bool = True,
) -> ProposedRound:
    """Pick the next batch under a core-hour budget and record it as a round.

    Only candidates with a structure that are monolayers (or ambiguous), not duplicates,
    not labelled and not pending in an earlier round can be picked. The same campaign
    state and seed give the same proposal, bit for bit.

    ``max_core_hours_per_hit`` (what a hit is worth to you) lets the stop rule advise
    stopping when the next hit is expected to cost more.

    ``diversity`` (a weight in [0, 1]) goes to strategies that take one; None means
    :data:`DEFAULT_DIVERSITY` for those and nothing for the others. A value for a
    strategy without the option (``random_selection``) is refused.

    Raises
    ------
    InputError
        Bad budget, strategy or diversity, or a budget below the cheapest candidate
        (nothing is recorded then).
    """
    from ase.io import write
    from pymatgen.io.ase import AseAtomsAdaptor

    from prescreen.acquire.measures import PoolView

    if not (budget_core_hours > 0 and math.isfinite(budget_core_hours)):
        raise InputError("bad budget", value=budget_core_hours,
                         expected="a finite number of core-hours > 0")
    if max_core_hours_per_hit is not None and not (0 < max_core_hours_per_hit < math.inf):
        raise InputError("bad worth of a hit", value=max_core_hours_per_hit,
                         expected="a finite number of core-hours > 0, or none")
    options = _strategy_options(strategy, diversity)
    func = strategy_by_name(strategy, **options)
    ranked = rank(campaign, progress=progress) if ranking is None else ranking
    feats = _feature_columns(candidate_features(campaign, progress=progress))
    pending = set(campaign.pending_ids())
    ok = (ranked["layer_status"].isin(PROPOSABLE_STATUSES)
          & ranked["duplicate_of"].isna() & ranked["spillage"].isna()
          & ~ranked.index.isin(pending) & ranked["cost_core_hours"].notna())
    pool = ranked[ok]
    if pool.empty:
        raise CampaignError("nothing left to propose: every candidate is labelled, pending, "
                            "a duplicate, not a monolayer, or has no structure")
    model, version = load_model(campaign)
    X = feats.loc[pool.index]
    labelled_ids = ranked.index[ranked["spillage"].notna()]
    view = PoolView.build(
        list(pool.index), np.nan_to_num(X.to_numpy(float)), pool["probability"].to_numpy(float),
        pool["uncertainty"].to_numpy(float), pool["cost_core_hours"].to_numpy(float),
        members=model.ensemble_proba(X), cost_low=pool["cost_low"].to_numpy(float),
        cost_high=pool["cost_high"].to_numpy(float),
        X_labelled=np.nan_to_num(feats.loc[labelled_ids].to_numpy(float)) if len(labelled_ids) else None,
    )
    proposal = func(view, float(budget_core_hours), np.random.default_rng(seed))
    if not len(proposal.ids):
        cheapest = pool["cost_core_hours"].idxmin()
        raise InputError(
            "the budget is below the predicted cost of every proposable candidate; nothing "
            "was recorded", value=f"{budget_core_hours:g} core-hours",
            expected=f"at least {pool.at[cheapest, 'cost_core_hours']:.3g} core-hours (the "
                     f"cheapest candidate, {cheapest})")
    table = proposal.to_frame().set_index("id")
    after = _stop_rule(pool.drop(index=table.index), max_core_hours_per_hit)
    table["formula"] = pool.loc[table.index, "formula"]
    table["flags"] = pool.loc[table.index, "flags"]
    rows = [{"id": cid, "probability": float(r.probability), "uncertainty": float(r.spread),
             "cost_core_hours": float(r.cost_core_hours), "reason": r.reason}
            for cid, r in table.iterrows()]
    number = campaign.record_round(
        strategy=proposal.strategy, budget_core_hours=budget_core_hours, seed=seed,
        model_version=version, proposals=rows,
        settings={"diversity": options.get("diversity"), "expected_hits": proposal.expected_hits,
                  "expected_hits_interval": [proposal.expected_hits_low,
                                             proposal.expected_hits_high],
                  "total_cost_core_hours": proposal.total_cost},
    )
    folder = campaign.path / "rounds" / f"round-{number:03d}"
    (folder / "cif").mkdir(parents=True, exist_ok=True)
    frames = []
    for cid in table.index:
        structure = campaign.structure(cid)
        with replacing(folder / "cif" / f"{cid}.cif") as tmp:
            structure.to(filename=str(tmp), fmt="cif")
        atoms = AseAtomsAdaptor.get_atoms(structure)
        atoms.info["id"] = cid
        frames.append(atoms)
    with replacing(folder / "batch.extxyz") as tmp:
        write(tmp, frames, format="extxyz")
    with replacing(folder / "proposals.csv") as tmp:
        table.to_csv(tmp)
    write_text(folder / "round.json", json.dumps({
        "round": number, "strategy": proposal.strategy, "seed": seed, "model": version,
        "budget_core_hours": budget_core_hours, "total_cost_core_hours": proposal.total_cost,
        "expected_hits": proposal.expected_hits,
        "expected_hits_interval": [proposal.expected_hits_low, proposal.expected_hits_high],
        "interval_level": proposal.interval_level, "interval_method": proposal.interval_method,
        "after_this_round": after,
        # What the report compares the batch with, fixed now: a later model or cost model
        # must not rewrite the figures a round was proposed on.
        "pool_at_proposal": _pool_summary(pool, budget_core_hours),
        "diversity": options.get("diversity"),
        "picks": {cid: {"formula": str(pool.at[cid, "formula"]),
                        "flags": str(pool.at[cid, "flags"] or ""),
                        "cost_low": float(pool.at[cid, "cost_low"]),
                        "cost_high": float(pool.at[cid, "cost_high"])} for cid in table.index},
    }, indent=2))
    return ProposedRound(number=number, table=table, folder=folder,
                         expected_hits=proposal.expected_hits,
                         expected_hits_interval=(proposal.expected_hits_low,
                                                 proposal.expected_hits_high),
                         total_cost=proposal.total_cost, budget=float(budget_core_hours),
                         strategy=proposal.strategy, after=after)


def _pool_summary(pool: pd.DataFrame, budget: float | None = None) -> dict[str, float]:
    """Size, mean probability and random selection's hits per core-hour of a pool.

    With a ``budget``, also ``cheapest_first_expected_hits`` and ``cheapest_first_picks``:
    the pool filled cheapest first within the budget, no model involved in the choice
    (how much of a batch's advantage comes from cheap cells alone).
    """
    p = pool["probability"].to_numpy(float)
    cost = pool["cost_core_hours"].to_numpy(float)
    out = {"size": int(len(pool)), "base_rate": float(p.mean()) if len(p) else float("nan"),
           "random_hits_per_core_hour": float(p.sum() / cost.sum()) if cost.sum() > 0
           else float("nan")}
    if budget is not None:
        from prescreen.acquire.selectors import top_within_budget

        cheap = top_within_budget(-cost, cost, float(budget)).indices
        out.update(cheapest_first_expected_hits=float(p[cheap].sum()),
                   cheapest_first_picks=int(len(cheap)))
    return out


def _stop_rule(rest: pd.DataFrame, max_core_hours_per_hit: float | None = None
               ) -> dict[str, Any]:
    """The stop rule over the candidates a round left in the pool, as plain numbers."""
    from dataclasses import asdict

    from prescreen.acquire.stopping import stop_estimate

    est = stop_estimate(rest["probability"].to_numpy(float),
                        rest["cost_core_hours"].to_numpy(float),
                        max_core_hours_per_hit=max_core_hours_per_hit)
    return {k: (float(v) if isinstance(v, (int, float, np.floating)) else v)
            for k, v in asdict(est).items()}


@dataclass(frozen=True)
class LabelOutcome:
    """What :func:`label_pending` computed and ingested."""

    n_jobs: int
    n_ok: int
    n_failed: int
    n_ingested: int
    failures: tuple[tuple[str, str], ...]  # (id, reason)
    core_hours: float
    out_dir: Path


def label_pending(
    campaign: Campaign,
    *,
    ids: list[str] | None = None,
    workers: int = 1,
    timeout_s: float = 1800.0,
    settings: Any = None,
    progress: bool = True,
    compute: Any = None,
    retry_failed: bool = False,
) -> LabelOutcome:
    """Compute spillage with the DFT labeller for pending proposals and ingest it.

    Calculations are checkpointed in ``<campaign>/labels/`` so a rerun after an
    interruption resumes; results land through the same path as a user's CSV, so
    ingesting twice changes nothing. Failed calculations are reported, not ingested.

    Parameters
    ----------
    ids
        Candidates to label (default: every pending proposal).
    workers, timeout_s
        Parallel single-core calculations and the wall-time limit per structure (s).
    settings
        :class:`prescreen.physics.dft.LabelSettings`; None takes the campaign's
        (:meth:`~prescreen.campaign.Campaign.label_settings`). Settings other than those
        of the campaign's earlier labels are refused.
    compute
        Replacement for the DFT calculation (tests); see
        :func:`prescreen.physics.labeller.run_labelling`.
    retry_failed
        Compute again the candidates whose earlier calculation failed (a timeout, a
        worker that died); without it they are reported as failed again.
    """
    import importlib.util
    import warnings

    from prescreen.errors import PrescreenWarning
    from prescreen.io.results import ResultRow
    from prescreen.physics.labeller import load_records, run_labelling

    if compute is None and importlib.util.find_spec("gpaw") is None:
        # checked here, not in each worker: a failure per candidate would be recorded
        raise CampaignError("GPAW is not installed, so nothing can be labelled; install it "
                            "with `make dft-env` (or `bash scripts/install_gpaw.sh .venv`)")
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    if cores and workers > cores:
        warnings.warn(f"{workers} workers on {cores} cores: the calculations share cores, "
                      "run longer than their timeout allows and record inflated core-hours; "
                      f"use --workers {cores} or fewer", PrescreenWarning, stacklevel=2)
    settings = (campaign.check_label_settings(settings) if settings is not None
                else campaign.label_settings())
    wanted = list(ids) if ids is not None else campaign.pending_ids()
    proposed = campaign.proposals()
    if len(proposed):
        cost = proposed.drop_duplicates("candidate_id", keep="last").set_index(
            "candidate_id")["cost_core_hours"]
        slow = [cid for cid in wanted if cid in cost.index and cost[cid] * 3600 > timeout_s]
        if slow:
            warnings.warn(f"{len(slow)} candidate(s) are predicted to need more than the "
                          f"{timeout_s:g} s timeout ({', '.join(slow[:5])}); raise --timeout "
                          "or they will fail", PrescreenWarning, stacklevel=2)
    if not wanted:
        raise CampaignError("nothing to label: no pending proposals (propose a round first)")
    known = campaign.labels().index
    done = [cid for cid in wanted if cid in known]
    if ids is not None and done:
        # computing them again would cost core-hours for a result that is not stored
        raise InputError("these candidates already have a result", value=", ".join(done[:10]),
                         expected="unlabelled IDs (to replace a result, ingest it with "
                                  "`prescreen ingest --on-conflict replace`)")
    jobs = []
    for cid in wanted:
        structure = campaign.structure(cid)
        if structure is None:
            raise InputError("candidate has no structure to compute", value=cid,
                             expected="a candidate read from a structure file")
        jobs.append((cid, structure))
    out_dir = campaign.labels_dir
    kwargs = {"compute": compute} if compute is not None else {}
    summary = run_labelling(jobs, out_dir, settings=settings, workers=workers,
                            timeout_s=timeout_s, progress=progress, retry_failed=retry_failed,
                            **kwargs)
    newest = {r.id: r for r in load_records(out_dir)}
    rows, failures = [], []
    for cid in wanted:
        rec = newest.get(cid)
        if rec is None:
            continue
        if not rec.ok:
            failures.append((cid, rec.error or "failed"))
            continue
        kmesh = rec.settings.get("kmesh") or rec.settings.get("kpts")
        pw = rec.settings.get("mode") == "pw"
        rows.append(ResultRow(
            id=cid, spillage=float(rec.spillage), functional=str(rec.settings.get("xc", "PBE")),
            code=f"GPAW {rec.versions.get('gpaw', '')}".strip() + (PW_CODE_SUFFIX if pw else ""),
            kmesh="x".join(str(k) for k in kmesh) if kmesh else None,
            core_hours=float(rec.core_hours), gap_soc_eV=float(rec.gap_soc_eV),
            direct_gap_soc_eV=(float(rec.direct_gap_soc_eV)
                               if math.isfinite(rec.direct_gap_soc_eV) else None),
            notes=f"prescreen DFT labeller ({'plane waves' if pw else 'LCAO'}, non-self-"
            "consistent spin-orbit coupling)", source=f"{out_dir / 'records.jsonl'}:{cid}",
        ))
    report = campaign.ingest_results((rows, []), on_conflict="keep")
    n_ok = sum(1 for cid in wanted if cid in newest and newest[cid].ok)
    return LabelOutcome(n_jobs=len(jobs), n_ok=n_ok,
                        n_failed=len(failures), n_ingested=report.added,
                        failures=tuple(failures), core_hours=float(summary.core_hours),
                        out_dir=out_dir)


#: Fewest labelled rows and positives for a retrospective replay worth showing (also the
#: floor of benchmarks/replay.py). A judgement, not a published rule: room for the initial
#: set and several rounds, and at least 20 positives, so that "half of the positives" is
#: ten or more hits and one lucky pick moves it by at most a tenth.
MIN_REPLAY_ROWS = 60
MIN_REPLAY_POSITIVES = 20
#: Strategies replayed for the report, against random selection.
REPLAY_STRATEGIES = ("expected_hits_per_core_hour", "greedy_probability")


def replay_labelled(
    campaign: Campaign | None,
    *,
    use_open: bool = True,
    strategies: tuple[str, ...] = REPLAY_STRATEGIES,
    seeds: tuple[int, ...] = (0, 1, 2),
    n_models: int = 3,
    n_rounds: int = 8,
    min_rows: int = MIN_REPLAY_ROWS,
    min_positives: int = MIN_REPLAY_POSITIVES,
    min_gap_eV: float | None = None,
    progress: bool = True,
) -> Any:
    """Replay campaigns on the labelled data (open plus the campaign's) for the report.

    A hit is a positive label of :func:`training_table` (``min_gap_eV`` as there).

    Each strategy, plus random selection, starts from 10 % of the rows at random and
    picks rounds of 10 % of the total recorded cost. Rows without a recorded cost are
    charged the median recorded cost (1 core-hour when none is recorded). Missing
    features count as 0 for the diversity distances only.

    Returns
    -------
    prescreen.report.ReplayCurves or None
        None when the labelled data has fewer than ``min_rows`` rows or
        ``min_positives`` positives (the curves would say nothing).
    """
    import pandas as pd

    from prescreen.acquire.cost import COST_TERMS, descriptors_for_structure, out_of_fold_costs
    from prescreen.acquire.replay import replay
    from prescreen.report import ReplayCurves

    table = training_table(campaign, use_open=use_open, min_gap_eV=min_gap_eV, progress=progress)
    if len(table) < min_rows or int(table.y.sum()) < min_positives:
        return None
    cost = table.core_hours.copy()
    known = np.isfinite(cost) & (cost > 0)
    cost[~known] = float(np.median(cost[known])) if known.any() else 1.0
    X = table.X.fillna(0.0)
    n = len(table)

    def factory(seed: int) -> SpillageClassifier:
        return _classifier(n_models, seed, n)

    # what a cost-aware strategy sees: a prediction, fitted without the row's own cost;
    # k-points on the mesh each row was computed with (the campaign's, the open dataset's)
    own = cost_kpoints(campaign)
    desc = pd.DataFrame([descriptors_for_structure(st, **(own if o == "campaign" else {}))
                         if st is not None else {}
                         for st, o in zip(table.structures or [None] * n, table.origin)],
                        columns=list(COST_TERMS))
    predicted, how = out_of_fold_costs(desc, table.core_hours, seed=seeds[0])
    n_initial, budget = max(2, n // 10), float(cost.sum()) / 10
    curves = [replay(X, table.y, cost, table.formulas, strategy_by_name(name), factory,
                     n_initial=n_initial, batch_budget=budget, predicted_cost=predicted,
                     n_rounds=n_rounds, seeds=seeds, name=name, progress=progress)
              for name in (*strategies, "random_selection")]
    filled = int((~known).sum())
    protocol = (f"{len(seeds)} campaigns per strategy (seeds), each starting from {n_initial} "
                f"rows at random, then up to {n_rounds} rounds of {budget:.3g} core-hours "
                "(a tenth of the total cost"
                + (f", with the median cost for the {filled} rows that recorded none" if filled
                   else "") + f"); a campaign pays the recorded costs, and its strategy "
                f"sees {how}")
    return ReplayCurves(curves=pd.concat(curves, ignore_index=True), y=table.y, cost=cost,
                        protocol=protocol)
