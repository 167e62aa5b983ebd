"""Collect everything the allocation report shows from a campaign into plain data.

:func:`collect` reads the campaign store (status, the proposed round, its model, the
labels), scores the candidates with :func:`prescreen.acquire.rounds.rank`, computes
SHAP values for the proposed candidates and out-of-fold predictions for the validation
curves, and returns a :class:`ReportData`. Rendering (figures and HTML) is in
:mod:`prescreen.report.render` and never recomputes anything.

:func:`build_report` is collect + render into one self-contained HTML file.
"""

from __future__ import annotations

import datetime as _dt
import json
from dataclasses import dataclass, field
from importlib import metadata as importlib_metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from prescreen.errors import CampaignError, InputError
from prescreen.hazards import SAFETY_NOTE
from prescreen.io.atomic import write_text
from prescreen.invariants import INVARIANTS_FILE

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

    from prescreen.campaign import Campaign, CampaignStatus
    from prescreen.explain import Explanation

__all__ = [
    "CAUTIONS",
    "budget_overrun_probability",
    "roc_auc_interval",
    "ENRICHMENT_K",
    "GLOBAL_SHAP_ROWS",
    "ReplayCurves",
    "ValidationData",
    "RoundSummary",
    "ProposalRow",
    "Provenance",
    "InvariantRow",
    "ReportData",
    "collect",
    "out_of_fold",
    "round_model_settings",
    "build_report",
    "CHROMIUM",
    "write_pdf",
]


#: Shortlist sizes of the enrichment table (those larger than the data are left out).
ENRICHMENT_K: tuple[int, ...] = (5, 10, 20, 50, 100)
#: Largest number of pool rows explained for the global SHAP plots (chosen evenly over
#: the ranking); keeps report time small on large pools.
GLOBAL_SHAP_ROWS: int = 200

#: Debian's headless browser, used for the optional PDF (``scripts/install_browser.sh``).
CHROMIUM = Path("/usr/bin/chromium")
#: Seconds the PDF printout may take.
PDF_TIMEOUT_S = 300

#: The cautions printed in every report.
CAUTIONS: tuple[str, ...] = (
    "A probability is not a topological classification. A high probability says that a "
    "spin-orbit spillage calculation is likely to return spillage at or above the "
    "threshold; it does not establish a band inversion or a topological phase. Confirm "
    "every hit with topological invariants: the Z2 index from Wilson loops (hybrid "
    "Wannier charge centres), or from parity eigenvalues at the time-reversal-invariant "
    "momenta when the layer has inversion symmetry (`prescreen z2` computes both with the "
    "built-in DFT labeller); a Chern number for magnetic layers.",
    "Flags for toxic or radioactive elements defer to local safety rules. " + SAFETY_NOTE,
    "Probabilities are calibrated on the training data. Candidates unlike anything in it "
    "(other elements, other structure types) carry larger errors than the ensemble "
    "spread suggests.",
)


@dataclass(frozen=True)
class ReplayCurves:
    """Discovery curves of a retrospective replay, as :func:`prescreen.acquire.replay.replay` gives.

    Attributes
    ----------
    curves : DataFrame
        Concatenated replay tables (columns :data:`prescreen.acquire.replay.CURVE_COLUMNS`).
    y : ndarray of {0, 1}, shape (N,)
        Labels of the replayed pool.
    cost : ndarray, shape (N,)
        Recorded core-hours of the replayed pool.
    protocol : str
        How the campaigns were run (seeds, initial set, round size), for the caption.
    """

    curves: Any
    y: np.ndarray
    cost: np.ndarray
    protocol: str = ""


@dataclass(frozen=True)
class ValidationData:
    """Grouped cross-validation of the model recipe.

    Attributes
    ----------
    y : ndarray of {0, 1}, shape (n,)
        Training labels.
    p_oof : ndarray, shape (n,)
        Out-of-fold calibrated probability of each row (predicted by a model that did
        not see the row's chemistry group).
    cv_table : DataFrame
        Metrics per fold plus ``mean``, ``std`` and ``pooled`` rows
        (:func:`prescreen.validation.cross_validate`).
    gap_soc_eV : ndarray, shape (n,), optional
        Band gap with spin-orbit coupling of each training row (NaN: not recorded).
    """

    y: np.ndarray
    p_oof: np.ndarray
    cv_table: Any
    gap_soc_eV: np.ndarray | None = None

    def hits_by_gap(self, metal_gap_eV: float | None = None) -> dict[str, float]:
        """Training hits with a gap, without one (metals, gap < ``metal_gap_eV``), unknown.

        ``metal_gap_eV`` defaults to the labeller's metal threshold
        (:data:`prescreen.physics.dft.METAL_GAP_EV`, the smearing scale); it is returned
        as ``"metal_gap_eV"``.
        """
        from prescreen.physics.dft import METAL_GAP_EV

        metal_gap_eV = METAL_GAP_EV if metal_gap_eV is None else float(metal_gap_eV)
        hits = np.asarray(self.y) == 1
        gap = (np.full(len(hits), np.nan) if self.gap_soc_eV is None
               else np.asarray(self.gap_soc_eV, dtype=float))
        known = np.isfinite(gap)
        return {"hits": int(hits.sum()),
                "gapped": int((hits & known & (gap >= metal_gap_eV)).sum()),
                "metallic": int((hits & known & (gap < metal_gap_eV)).sum()),
                "unknown": int((hits & ~known).sum()), "metal_gap_eV": metal_gap_eV}

    def enrichment(self) -> pd.DataFrame:
        """Hits in the top ``k`` of the out-of-fold ranking against random, per ``k``.

        Returns
        -------
        DataFrame
            Columns ``k``, ``hits`` (in the top k), ``random_hits`` (k times the base
            rate), ``enrichment`` (:func:`prescreen.validation.enrichment_factor`).
        """
        import pandas as pd

        from prescreen.validation import enrichment_factor

        n, rate = len(self.y), float(np.mean(self.y)) if len(self.y) else float("nan")
        order = np.argsort(-self.p_oof, kind="stable")
        rows = []
        for k in [k for k in ENRICHMENT_K if k <= n] or ([n] if n else []):
            rows.append({"k": k, "hits": int(np.asarray(self.y)[order[:k]].sum()),
                         "random_hits": k * rate,
                         "enrichment": enrichment_factor(self.y, self.p_oof, k)})
        return pd.DataFrame(rows, columns=["k", "hits", "random_hits", "enrichment"])


@dataclass(frozen=True)
class RoundSummary:
    """A proposed round and what random selection from the same pool would give.

    Attributes
    ----------
    number, strategy, seed, model
        As recorded in ``rounds/round-NNN/round.json``.
    budget_core_hours, total_cost_core_hours : float
        Budget and predicted cost of the batch (core-hours).
    expected_hits : float
        Sum of the picks' calibrated probabilities.
    expected_hits_interval : (float, float)
        Interval of the number of hits at ``interval_level`` (``interval_method``).
    n_picks, pool_size : int
        Candidates picked, and candidates that could have been picked.
    pool_base_rate : float
        Mean calibrated probability over the pool: the expected hit rate of a random pick.
    random_expected_hits : float
        Expected hits of random picks for the batch's predicted cost:
        ``random_hits_per_core_hour * total_cost_core_hours`` (the same spend, not the
        same number of picks: random picks cost what the pool costs on average).
    hits_per_core_hour, random_hits_per_core_hour : float
        Expected hits over predicted core-hours, for the batch and for random picks
        (sum of p over sum of cost, over the pool).
    after : dict or None
        The stop rule over the pool this round leaves (``round.json``,
        ``after_this_round``; see :func:`prescreen.acquire.stopping.stop_estimate`).
    same_number_random_hits : float
        ``pool_base_rate * n_picks``: random picks of the same number (ignoring cost).
    cheapest_first_expected_hits, cheapest_first_picks : float or None
        The pool filled cheapest first within the budget, no model in the choice (None
        for rounds proposed before it was recorded).
    diversity : float or None
        The diversity weight the strategy used (None: none, or not recorded).
    overrun_independent, overrun_correlated : float
        Chance that the batch's real cost exceeds the budget, with the per-candidate cost
        errors independent or all moving together (:func:`budget_overrun_probability`).
    """

    number: int
    strategy: str
    seed: int | None
    model: str
    budget_core_hours: float
    total_cost_core_hours: float
    expected_hits: float
    expected_hits_interval: tuple[float, float]
    interval_level: float
    interval_method: str
    n_picks: int
    pool_size: int
    pool_base_rate: float
    random_expected_hits: float
    hits_per_core_hour: float
    random_hits_per_core_hour: float
    after: dict[str, Any] | None = None
    same_number_random_hits: float = float("nan")
    cheapest_first_expected_hits: float | None = None
    cheapest_first_picks: int | None = None
    diversity: float | None = None
    overrun_independent: float = float("nan")
    overrun_correlated: float = float("nan")


@dataclass(frozen=True)
class ProposalRow:
    """One proposed candidate as stored, with its predicted cost interval and flags."""

    rank: int
    id: str
    formula: str
    probability: float
    uncertainty: float
    cost_core_hours: float
    cost_low: float
    cost_high: float
    flags: str
    reason: str
    status: str


@dataclass(frozen=True)
class Provenance:
    """One ingredient of the results and its licence."""

    item: str
    licence: str
    note: str


@dataclass(frozen=True)
class InvariantRow:
    """One line of ``<campaign>/z2.csv`` (written by ``prescreen z2``), with the spillage."""

    id: str
    formula: str
    z2: int | None
    delta: str
    #: How Z2 was found, in words ("parities +1 +1 +1 -1", "Wilson loops, 11 x 24 k").
    method: str
    direct_gap_soc_eV: float | None
    status: str
    reason: str
    spillage: float | None
    #: The Wilson-loop flow (:class:`prescreen.physics.wilson.WilsonZ2`) when stored.
    flow: Any = None


@dataclass(frozen=True)
class ReportData:
    """Everything the report shows; built by :func:`collect`."""

    campaign_name: str
    campaign_path: str
    generated_at: str
    prescreen_version: str
    status: CampaignStatus
    threshold: float
    labelled_base_rate: float
    round: RoundSummary
    proposals: tuple[ProposalRow, ...]
    explanation: Explanation  # rows: the proposed candidates, in rank order
    global_explanation: Explanation  # rows: a sample of the pool
    validation: ValidationData | None
    spent_core_hours: float
    n_costed_results: int
    cost_model: dict[str, Any]
    provenance: tuple[Provenance, ...]
    cautions: tuple[str, ...] = CAUTIONS
    replay: ReplayCurves | None = None
    notes: tuple[str, ...] = field(default_factory=tuple)
    #: What a hit is, in words (see :func:`prescreen.acquire.rounds.positive_rule`).
    positive_rule: str = ""
    #: Z2 invariants computed for the campaign's candidates (``prescreen z2``).
    invariants: tuple[InvariantRow, ...] = ()
    #: Pooled out-of-fold ROC-AUC with a 95 % bootstrap interval (None without validation).
    skill: dict[str, float] | None = None
    #: Highest probability the round's model gives one of the campaign's labelled
    #: non-hits (None when it has none), and how many picks score no higher.
    negative_ceiling: float | None = None
    picks_at_or_below_negatives: int | None = None
    #: The built-in labeller's level of theory for this campaign, in words.
    level_of_theory: str = ""


#: Draws of the Monte Carlo estimates in the report (seeded; chosen here).
MONTE_CARLO_DRAWS = 20000


def budget_overrun_probability(cost: Any, low: Any, high: Any, budget: float, *,
                               level: float = 0.9, correlated: bool = False,
                               draws: int = MONTE_CARLO_DRAWS, seed: int = 0) -> float:
    """Chance that the summed real cost of a batch exceeds ``budget``.

    Each candidate's cost is log-normal with median ``cost`` and the central ``level``
    interval ``(low, high)`` (the cost model's interval,
    :meth:`prescreen.acquire.cost.CostModel.predict_interval`, is Student-t in log space
    after a fit: a normal of the same central width has lighter tails, so with few
    fitted records the chance of a large overrun is somewhat understated); the
    log-errors are
    independent, or (``correlated``) one common error scales every candidate. Monte
    Carlo with a fixed seed. NaN when there is nothing to sum.
    """
    from scipy import stats

    cost, low, high = (np.asarray(a, dtype=float) for a in (cost, low, high))
    ok = np.isfinite(cost) & np.isfinite(low) & np.isfinite(high) & (cost > 0)
    if not ok.any():
        return float("nan")
    z90 = float(stats.norm.ppf(0.5 + level / 2))
    sigma = 0.5 * (np.log(high[ok]) - np.log(low[ok])) / z90
    rng = np.random.default_rng(seed)
    shape = (draws, 1) if correlated else (draws, int(ok.sum()))
    totals = (cost[ok] * np.exp(sigma * rng.standard_normal(shape))).sum(axis=1)
    return float(np.mean(totals > budget))


def roc_auc_interval(y: Any, p: Any, *, level: float = 0.95, draws: int = 2000,
                     seed: int = 0) -> dict[str, float]:
    """ROC-AUC of out-of-fold predictions with a percentile bootstrap interval over rows.

    Returns ``{"roc_auc", "low", "high", "n", "positives"}``; NaN where undefined (one
    class, or no resample with both classes).
    """
    from sklearn.metrics import roc_auc_score

    y, p = np.asarray(y).astype(int), np.asarray(p, dtype=float)
    keep = np.isfinite(p)
    y, p = y[keep], p[keep]
    out = {"roc_auc": float("nan"), "low": float("nan"), "high": float("nan"),
           "n": float(len(y)), "positives": float(y.sum())}
    if len(set(y.tolist())) < 2:
        return out
    out["roc_auc"] = float(roc_auc_score(y, p))
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, len(y), (draws, len(y)))
    scores = _auc_rows(y[idx], p[idx])
    scores = scores[np.isfinite(scores)]
    if scores.size:
        out["low"], out["high"] = (float(q) for q in
                                   np.quantile(scores, [(1 - level) / 2, (1 + level) / 2]))
    return out


def _auc_rows(y: np.ndarray, p: np.ndarray) -> np.ndarray:
    """ROC-AUC of each row of ``(m, n)`` labels and scores (Mann-Whitney U over average
    ranks, so ties count one half); NaN for a row with one class."""
    from scipy.stats import rankdata

    ranks = rankdata(p, axis=1)
    pos = y.sum(axis=1).astype(float)
    neg = y.shape[1] - pos
    u = (ranks * y).sum(axis=1) - pos * (pos + 1) / 2
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where((pos > 0) & (neg > 0), u / (pos * neg), np.nan)


# ------------------------------------------------------------------------------ helpers
def _round_record(campaign: Campaign, round_number: int | None) -> dict[str, Any]:
    proposals = campaign.proposals()
    if proposals.empty:
        raise CampaignError(f"{campaign.path}: no round has been proposed yet; run a proposal first")
    rounds = sorted(int(r) for r in proposals["round"].unique())
    number = rounds[-1] if round_number is None else int(round_number)
    if number not in rounds:
        raise InputError("no such round in the campaign", path=campaign.path, value=round_number,
                         expected=f"one of {rounds}")
    path = campaign.path / "rounds" / f"round-{number:03d}" / "round.json"
    if not path.is_file():
        raise CampaignError(f"{path}: the round record is missing")
    try:
        return json.loads(path.read_text())
    except json.JSONDecodeError as exc:
        raise InputError("round record is not valid JSON", path=path, line=exc.lineno,
                         expected="the file written by propose") from exc


def _round_model(campaign: Campaign, version: str):
    """The model a round was proposed with (by version), else the latest one."""
    from prescreen.acquire.rounds import DEFAULT_MODEL_DIR, load_model
    from prescreen.featurise import schema_version
    from prescreen.model import SpillageClassifier

    folder = DEFAULT_MODEL_DIR if version == "default" else campaign.path / "models" / version
    if (folder / "metadata.json").is_file():
        return SpillageClassifier.load(folder, expected_schema=schema_version()), folder
    model, _ = load_model(campaign)
    return model, None


def out_of_fold(model: Any, X: Any, y: np.ndarray, formulas: list[str], *, n_splits: int = 5,
                random_state: int = 0, sample_weight: np.ndarray | None = None) -> np.ndarray:
    """Out-of-fold probabilities of a fresh copy of ``model`` under grouped folds.

    Parameters
    ----------
    model
        An estimator (cloned per fold with :func:`sklearn.base.clone`).
    X : DataFrame, shape (n, d)
    y : ndarray of {0, 1}, shape (n,)
    formulas : list of str, length n
        Chemistry groups, as in :func:`prescreen.validation.grouped_folds`.
    sample_weight : ndarray, shape (n,), optional
        Training weights (the campaign's rows weighted as in training).

    Returns
    -------
    ndarray, shape (n,)
        Each row's probability from the fold model that did not see its group.
    """
    from sklearn.base import clone

    from prescreen.validation import formula_groups, grouped_folds

    y = np.asarray(y)
    groups = formula_groups(formulas)
    p = np.full(len(y), np.nan)
    for tr, te in grouped_folds(formulas, n_splits=n_splits, y=y, random_state=random_state):
        fold = clone(model)
        kw = {} if sample_weight is None else {"sample_weight": np.asarray(sample_weight)[tr]}
        fold.fit(X.iloc[tr], y[tr], groups=groups[tr], **kw)
        p[te] = fold.predict_proba(X.iloc[te])[:, 1]
    return p


def _model_settings(campaign: Campaign, version: str) -> dict[str, Any]:
    """Training settings recorded with model ``version`` ({} for the shipped default)."""
    record = campaign.model_record(version) if version != "default" else None
    return dict(record["settings"]) if record is not None else {}


def round_model_settings(campaign: Campaign, round_number: int | None = None) -> dict[str, Any]:
    """Training settings of the model a round was proposed with (default: latest round).

    Keys as recorded by :func:`prescreen.acquire.rounds.train` (``use_open``,
    ``campaign_weight``, ``campaign_filter``, ``min_gap_eV``, ...); ``{}`` for the shipped
    default model, which was trained on ``data_open/`` alone.
    """
    return _model_settings(campaign, str(_round_record(campaign, round_number).get("model", "")))


def _validation(campaign: Campaign, model: Any, model_dir: Path | None,
                use_open: bool, progress: bool, *,
                settings: dict[str, Any] | None = None,
                training_rows: int | None = None,
                threshold: float | None = None) -> tuple[ValidationData | None, list[str]]:
    """Grouped out-of-fold validation of the model's recipe on today's labelled data.

    The table is rebuilt the way training built it, from ``settings`` (the model's
    recorded ``campaign_weight``, ``campaign_filter`` and ``min_gap_eV``), ``use_open``
    and the model's spillage ``threshold``, but with the labels as they are now: when ``training_rows`` (the
    model's recorded count) differs, the stored per-fold table describes the smaller
    training set, and a note says so. Returns the validation (None when it cannot be
    made) and the notes.
    """
    import pandas as pd

    from prescreen.acquire.rounds import training_table

    settings = settings or {}
    notes: list[str] = []
    try:
        table = training_table(campaign, use_open=use_open, threshold=threshold,
                               campaign_weight=float(settings.get("campaign_weight", 1.0)),
                               campaign_filter=settings.get("campaign_filter") or None,
                               min_gap_eV=settings.get("min_gap_eV"), progress=progress)
    except (CampaignError, InputError) as exc:
        return None, [f"validation left out: {exc}"]
    if len(set(table.y)) < 2:
        return None, ["validation left out: the training data has one class only"]
    cv_path = None if model_dir is None else model_dir / "grouped_cv.csv"
    cv_table = pd.read_csv(cv_path, index_col=0) if cv_path and cv_path.is_file() else None
    if training_rows is not None and training_rows != len(table):
        notes.append(f"the model was trained on {training_rows} rows and the labelled data "
                     f"now has {len(table)}: the per-fold table is the model's own, from "
                     "training; the curves and the enrichment use today's rows")
    if cv_table is None:
        from prescreen.validation import cross_validate
        from sklearn.base import clone

        cv_table = cross_validate(lambda: clone(model), table.X, table.y, table.formulas,
                                  progress=progress, random_state=0, label="grouped CV",
                                  sample_weight=table.weight)
    p = out_of_fold(model, table.X, table.y, table.formulas, sample_weight=table.weight)
    return ValidationData(y=np.asarray(table.y), p_oof=p, cv_table=cv_table,
                          gap_soc_eV=table.gap_soc_eV), notes


def _provenance(campaign: Campaign, used_open: bool) -> tuple[Provenance, ...]:
    def version(name: str) -> str:
        try:
            return importlib_metadata.version(name)
        except importlib_metadata.PackageNotFoundError:
            return "not installed"

    items = []
    if used_open:
        items.append(Provenance(
            "data_open/ (labelled monolayers shipped with prescreen)", "CC-BY-4.0",
            "Creative Commons Attribution 4.0 International; structures generated and "
            "labelled by the prescreen project, no external materials database."))
    labels = campaign.labels()
    codes = sorted({str(c) for c in labels["code"].dropna()}) if len(labels) else []
    items.append(Provenance(
        f"Campaign results ({len(labels)} DFT labels in {campaign.path.name})", "yours",
        "codes recorded: " + (", ".join(codes) if codes else "none recorded")))
    items.append(Provenance(
        "Magpie element property tables (from matminer " + version("matminer") + ")",
        "BSD (modified BSD licence of matminer)",
        "L. Ward et al., npj Comput. Mater. 2, 16028 (2016); only the element tables are used."))
    items.append(Provenance(
        "Valence spin-orbit splittings (prescreen/data)", "BSD-3-Clause (prescreen)",
        "computed by the project with Quantum ESPRESSO ld1.x (GPL-2.0)."))
    if used_open or any("gpaw" in c.lower() for c in codes):
        items.append(Provenance(
            "GPAW " + version("gpaw").replace("not installed", "(labels of data_open/)"),
            "GPL-3.0-or-later", "DFT code of the spillage labels (results only; not linked)."))
    for name, lic in (("lightgbm", "MIT"), ("shap", "MIT"), ("scikit-learn", "BSD-3-Clause"),
                      ("pymatgen", "MIT"), ("ase", "LGPL-2.1-or-later"), ("spglib", "BSD-3-Clause"),
                      ("matplotlib", "matplotlib licence (PSF-style)"), ("jinja2", "BSD-3-Clause")):
        items.append(Provenance(f"{name} {version(name)}", lic, "software"))
    return tuple(items)


def _labelled_hit_fraction(labels: pd.DataFrame, threshold: float,
                           min_gap_eV: float | None) -> float:
    """Fraction of the campaign's results that are hits by the model's rule (NaN if none).

    With a gap requirement a result without a recorded gap does not count as a hit.
    """
    import pandas as pd

    if not len(labels):
        return float("nan")
    hit = labels["spillage"].to_numpy(float) >= threshold
    if min_gap_eV is not None:
        gap = pd.to_numeric(labels["gap_soc_eV"], errors="coerce").to_numpy(float)
        hit &= np.nan_to_num(gap, nan=-1.0) >= min_gap_eV
    return float(hit.mean())


def _invariants(campaign: Campaign, labels: pd.DataFrame) -> tuple[InvariantRow, ...]:
    """The rows of ``<campaign>/z2.csv`` (none when absent), with each one's spillage."""
    from prescreen.invariants import method_words, read_flow, read_invariants

    path = campaign.path / INVARIANTS_FILE
    rows = []
    for i, r in enumerate(read_invariants(path).values(), start=2):
        try:
            rows.append(InvariantRow(
                id=r["id"], formula=r["formula"], z2=int(r["z2"]) if r["z2"] else None,
                delta=r["delta"], method=method_words(r),
                direct_gap_soc_eV=float(r["direct_gap_soc_eV"]) if r["direct_gap_soc_eV"] else None,
                status=r["status"], reason=r["reason"],
                spillage=(float(labels.loc[r["id"], "spillage"]) if r["id"] in labels.index
                          else None),
                flow=read_flow(path, r["id"]) if r["method"] == "wilson" else None))
        except ValueError as exc:
            raise InputError(f"bad invariants row: {exc}", path=path, line=i, value=str(r)[:120],
                             expected="the columns written by `prescreen z2`") from exc
    return tuple(rows)


def _pool_mask(ranked: pd.DataFrame, pending: set[str], picked: set[str]) -> np.ndarray:
    """Candidates that could be picked in the round: as in propose, plus the picks."""
    from prescreen.acquire.rounds import PROPOSABLE_STATUSES

    free = ranked["spillage"].isna() & ~ranked.index.isin(pending - picked)
    ok = (ranked["layer_status"].isin(PROPOSABLE_STATUSES) & ranked["duplicate_of"].isna()
          & ranked["cost_core_hours"].notna() & free)
    return (ok | ranked.index.isin(picked)).to_numpy()


def _even_sample(n: int, k: int) -> np.ndarray:
    return np.unique(np.linspace(0, n - 1, num=min(n, k)).round().astype(int)) if n else np.zeros(0, int)


# ------------------------------------------------------------------------------ collect
def collect(
    campaign: Campaign,
    *,
    round_number: int | None = None,
    replay_curves: ReplayCurves | None = None,
    validation: ValidationData | None = None,
    use_open: bool | None = None,
    progress: bool = False,
) -> ReportData:
    """Gather the report's content for one round of a campaign.

    Parameters
    ----------
    campaign
        An open campaign with at least one proposed round.
    round_number
        The round to report (default: the latest).
    replay_curves
        Discovery curves of a replay, shown when given.
    validation
        Precomputed validation (else recomputed: grouped out-of-fold predictions of the
        model's recipe on its training table).
    use_open
        Whether the model's training table includes ``data_open/`` (default: as recorded
        with the round's model; the shipped default model did).
    progress
        Show progress bars.

    Returns
    -------
    ReportData
    """
    from prescreen import __version__
    from prescreen.acquire.rounds import (_feature_columns, _pool_summary, candidate_features,
                                          positive_rule, rank)
    from prescreen.explain import explain

    rec = _round_record(campaign, round_number)
    number = int(rec["round"])
    stored = campaign.proposals(number)
    model, model_dir = _round_model(campaign, str(rec.get("model", "")))
    ranked = rank(campaign, progress=progress)
    feats = _feature_columns(candidate_features(campaign, progress=progress))
    ids = list(stored["candidate_id"])
    notes = []
    recorded_picks = rec.get("picks") or {}
    rows = []
    for r in stored.itertuples():
        info = recorded_picks.get(r.candidate_id) or ranked.loc[r.candidate_id]
        rows.append(ProposalRow(
            rank=int(r.rank), id=str(r.candidate_id), formula=str(info["formula"]),
            probability=float(r.probability), uncertainty=float(r.uncertainty),
            cost_core_hours=float(r.cost_core_hours), cost_low=float(info["cost_low"]),
            cost_high=float(info["cost_high"]), flags=str(info["flags"] or ""),
            reason=str(r.reason or ""), status=str(r.status)))
    picked = set(ids)
    pool = ranked[_pool_mask(ranked, set(campaign.pending_ids()), picked)]
    at_proposal = rec.get("pool_at_proposal")
    if at_proposal is None:
        # rounds proposed before the pool was recorded with the round
        at_proposal = _pool_summary(pool)
        notes.append("the pool figures of this round were recomputed with today's model and "
                     "cost model (the round did not record them)")
    base_rate = float(at_proposal["base_rate"])
    total = float(rec["total_cost_core_hours"])
    random_rate = float(at_proposal["random_hits_per_core_hour"])
    # What a hit is comes from the model the round used, not from today's campaign setting.
    threshold = float(getattr(model, "threshold_", None) or campaign.threshold)
    if threshold != campaign.threshold:
        notes.append(f"the round's model counts a hit at spillage >= {threshold:g} while the "
                     f"campaign's threshold is {campaign.threshold:g}; its probabilities and "
                     "this report's validation use the model's threshold (retrain with "
                     "`prescreen train` to use the campaign's)")
    picked_costs = [[getattr(r, k) for r in rows] for k in ("cost_core_hours", "cost_low",
                                                            "cost_high")]
    budget = float(rec["budget_core_hours"])
    summary = RoundSummary(
        number=number, strategy=str(rec["strategy"]), seed=rec.get("seed"),
        model=str(rec.get("model", "")), budget_core_hours=budget,
        total_cost_core_hours=total, expected_hits=float(rec["expected_hits"]),
        expected_hits_interval=(float(rec["expected_hits_interval"][0]),
                                float(rec["expected_hits_interval"][1])),
        interval_level=float(rec.get("interval_level", float("nan"))),
        interval_method=str(rec.get("interval_method", "")),
        n_picks=len(ids), pool_size=int(at_proposal["size"]), pool_base_rate=base_rate,
        random_expected_hits=random_rate * total,
        hits_per_core_hour=float(rec["expected_hits"]) / total if total > 0 else float("nan"),
        random_hits_per_core_hour=random_rate,
        after=rec.get("after_this_round"),
        same_number_random_hits=base_rate * len(ids),
        cheapest_first_expected_hits=at_proposal.get("cheapest_first_expected_hits"),
        cheapest_first_picks=at_proposal.get("cheapest_first_picks"),
        diversity=rec.get("diversity"),
        overrun_independent=budget_overrun_probability(*picked_costs, budget),
        overrun_correlated=budget_overrun_probability(*picked_costs, budget, correlated=True),
    )
    settings = _model_settings(campaign, summary.model)
    used_open = bool(settings.get("use_open", True)) if use_open is None else bool(use_open)
    explanation = explain(model, feats.loc[ids])
    sample = pool.index[_even_sample(len(pool), GLOBAL_SHAP_ROWS)]
    global_explanation = explain(model, feats.loc[sample])
    if validation is None:
        record = (campaign.model_record(summary.model) if summary.model != "default" else None)
        validation, more = _validation(campaign, model, model_dir, used_open, progress,
                                       settings=settings,
                                       training_rows=None if record is None
                                       else int(record["training_rows"]),
                                       threshold=threshold)
        notes.extend(more)
    status = campaign.status()
    labels = campaign.labels()
    costs = labels["core_hours"].dropna() if len(labels) else labels.get("core_hours", [])
    from prescreen.acquire.rounds import cost_model_with_source

    fitted, source = cost_model_with_source(campaign)
    cost_model = fitted.as_dict()
    cost_model["source"] = source
    ceiling = _negative_ceiling(model, feats, labels, threshold,
                                getattr(model, "min_gap_eV_", None))
    return ReportData(
        campaign_name=campaign.name, campaign_path=str(campaign.path),
        generated_at=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        prescreen_version=__version__, status=status, threshold=campaign.threshold,
        labelled_base_rate=_labelled_hit_fraction(labels, threshold,
                                                  getattr(model, "min_gap_eV_", None)),
        round=summary, proposals=tuple(rows), explanation=explanation,
        global_explanation=global_explanation, validation=validation,
        spent_core_hours=float(np.sum(costs)) if len(costs) else 0.0,
        n_costed_results=int(len(costs)), cost_model=cost_model,
        provenance=_provenance(campaign, used_open), replay=replay_curves, notes=tuple(notes),
        positive_rule=positive_rule(threshold, getattr(model, "min_gap_eV_", None)),
        invariants=_invariants(campaign, labels),
        skill=None if validation is None else roc_auc_interval(validation.y, validation.p_oof),
        negative_ceiling=ceiling, level_of_theory=campaign.describe_label_settings(),
        picks_at_or_below_negatives=(None if ceiling is None else
                                     sum(r.probability <= ceiling for r in rows)),
    )


def _negative_ceiling(model: Any, feats: Any, labels: Any, threshold: float,
                      min_gap_eV: float | None) -> float | None:
    """The highest probability ``model`` gives a labelled non-hit of the campaign."""
    if not len(labels):
        return None
    spill = labels["spillage"].to_numpy(float)
    hit = spill >= threshold
    if min_gap_eV is not None:
        hit &= labels["gap_soc_eV"].to_numpy(float) >= min_gap_eV  # NaN gap: no hit
    ids = [i for i in labels.index[~hit] if i in feats.index]
    if not ids:
        return None
    return float(np.max(model.predict_proba(feats.loc[ids])[:, 1]))


def build_report(
    campaign: Campaign,
    *,
    out_path: str | Path,
    round_number: int | None = None,
    replay_curves: ReplayCurves | None = None,
    validation: ValidationData | None = None,
    use_open: bool | None = None,
    progress: bool = False,
) -> Path:
    """Write the allocation report of a campaign round as one self-contained HTML file.

    Parameters
    ----------
    campaign
        An open campaign with at least one proposed round.
    out_path
        Where to write the HTML file (folders are created).
    round_number, replay_curves, validation, use_open, progress
        See :func:`collect`.

    Returns
    -------
    Path
        ``out_path``.
    """
    from prescreen.report.render import render_html

    data = collect(campaign, round_number=round_number, replay_curves=replay_curves,
                   validation=validation, use_open=use_open, progress=progress)
    out = Path(out_path)
    out.parent.mkdir(parents=True, exist_ok=True)
    write_text(out, render_html(data))
    return out


def write_pdf(html_path: str | Path, pdf_path: str | Path | None = None) -> Path | None:
    """Print the HTML report to PDF with headless Chromium, if it is installed.

    Parameters
    ----------
    html_path
        The report written by :func:`build_report`.
    pdf_path
        Output file (default: ``html_path`` with suffix ``.pdf``).

    Returns
    -------
    Path or None
        The PDF, or ``None`` when :data:`CHROMIUM` is not installed (the PDF is optional).

    Raises
    ------
    PrescreenError
        Chromium ran but wrote no PDF (its log is in the message).
    """
    import subprocess
    import tempfile

    from prescreen.errors import PrescreenError

    if not CHROMIUM.is_file():
        return None
    html_path = Path(html_path).resolve()
    if not html_path.is_file():
        raise InputError("report file not found", path=html_path, expected="an HTML report")
    out = Path(pdf_path) if pdf_path is not None else html_path.with_suffix(".pdf")
    out.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(prefix="prescreen-chromium-") as profile:
        run = subprocess.run(
            [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
             "--no-first-run", "--disable-background-networking", "--disable-component-update",
             "--disable-sync", f"--user-data-dir={profile}", "--no-pdf-header-footer",
             f"--print-to-pdf={out.resolve()}", html_path.as_uri()],
            capture_output=True, text=True, timeout=PDF_TIMEOUT_S, check=False,
        )
    if not out.is_file() or out.stat().st_size == 0:
        raise PrescreenError(f"{CHROMIUM} wrote no PDF for {html_path}: {run.stderr[-1000:]}")
    return out
