"""The allocation report: every figure is there and its numbers are the store's.

The campaign is built from real monolayer structures (ASE's ``mx2`` builder, 2H and 1T
transition-metal dichalcogenides). Their spillage labels are *synthetic* test data drawn
from a seeded generator (heavier chemistry more often above the threshold, with 15 %
label noise, in the spirit of ``sklearn.datasets.make_classification``): they are not
physical values and no test compares against them — the tests check structure and that
the report repeats what the campaign store holds.
"""

from __future__ import annotations

import base64
import json
import re
import shutil
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from prescreen.campaign import Campaign
from prescreen.errors import CampaignError, InputError
from prescreen.hazards import SAFETY_NOTE
from prescreen.report import CAUTIONS, ReplayCurves, build_report, collect
from prescreen.report.render import FIGURE_IDS

METALS = ("Mo", "W", "Cr", "Ti", "Zr", "Hf", "Nb", "Ta", "V", "Pt", "Pd", "Ni")
CHALCOGENS = ("S", "Se", "Te")
#: Synthetic rule for the test labels only (see module docstring).
HEAVY = {"W", "Hf", "Ta", "Pt", "Te"}
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def build_small_campaign(path: Path, *, seed: int = 0):
    """A 72-candidate campaign with 54 synthetic labels, a tiny model and one round.

    Returns
    -------
    (Campaign, ProposedRound, TrainedModel)
    """
    from ase.build import mx2
    from pymatgen.io.ase import AseAtomsAdaptor

    from prescreen.acquire.rounds import propose, rank, train
    from prescreen.candidate import Candidate
    from prescreen.io.results import ResultRow

    camp = Campaign.create(path, name="report test")
    cands = []
    for m in METALS:
        for x in CHALCOGENS:
            for phase in ("2H", "1T"):
                atoms = mx2(f"{m}{x}2", phase, a=3.2, thickness=3.2, vacuum=9.0)
                cands.append(Candidate(f"{m}{x}2-{phase}", f"{m}{x}2", "ase.build.mx2",
                                       AseAtomsAdaptor.get_structure(atoms)))
    camp.add_candidates(cands)
    rng = np.random.default_rng(seed)
    rows = []
    for i, cand in enumerate(cands[::2] + cands[1::4]):
        metal = re.match(r"[A-Z][a-z]?", cand.formula).group(0)
        hit = (metal in HEAVY or "Te" in cand.formula) ^ bool(rng.random() < 0.15)
        spill = rng.uniform(0.55, 1.0) if hit else rng.uniform(0.0, 0.45)
        rows.append(ResultRow(id=cand.id, spillage=float(spill), code="GPAW", functional="PBE",
                              core_hours=float(rng.uniform(5, 20)), source=f"synthetic.csv:{i + 2}"))
    camp.ingest_results((rows, []))
    trained = train(camp, use_open=False, n_models=2, progress=False)
    ranked = rank(camp, progress=False)
    budget = 4 * float(np.nanmedian(ranked["cost_core_hours"]))
    proposed = propose(camp, budget_core_hours=budget, ranking=ranked, progress=False)
    return camp, proposed, trained


def small_replay(camp: Campaign) -> ReplayCurves:
    """A real two-round replay of random selection on the campaign's labelled rows."""
    from prescreen.acquire.replay import replay
    from prescreen.acquire.rounds import training_table
    from prescreen.acquire.strategies import random_selection
    from prescreen.model import SpillageClassifier

    table = training_table(camp, use_open=False, progress=False)
    cost = camp.labels().loc[table.X.index, "core_hours"].to_numpy(float)
    curves = replay(table.X, table.y, cost, table.formulas, random_selection,
                    lambda s: SpillageClassifier(n_models=1, n_estimators=10, min_child_samples=3,
                                                 random_state=s),
                    n_initial=10, batch_budget=40.0, n_rounds=2, seeds=(0, 1), progress=False)
    return ReplayCurves(curves=curves, y=table.y, cost=cost)


class _Collector(HTMLParser):
    """Every start tag with its attributes, and the visible text."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, {k: v or "" for k, v in attrs}))

    def handle_data(self, data):
        self.text.append(data)


def parse(html: str) -> _Collector:
    c = _Collector()
    c.feed(html)
    return c


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    camp, proposed, trained = build_small_campaign(root / "camp")
    curves = small_replay(camp)
    out = build_report(camp, out_path=root / "out" / "report.html", replay_curves=curves)
    yield {"campaign": camp, "proposed": proposed, "trained": trained, "path": out,
           "html": out.read_text(encoding="utf-8")}
    camp.close()


def test_every_figure_is_embedded_as_png(built):
    doc = parse(built["html"])
    imgs = {a["id"]: a["src"] for t, a in doc.tags if t == "img"}
    ids = [*FIGURE_IDS, "fig-roc", "fig-pr", "fig-calibration", "fig-discovery"]
    ids += [f"fig-waterfall-{cid}" for cid in built["proposed"].table.index]
    assert sorted(imgs) == sorted(ids)
    for fid, src in imgs.items():
        head, _, payload = src.partition(",")
        assert head == "data:image/png;base64", fid
        png = base64.b64decode(payload)
        assert png.startswith(PNG_MAGIC) and len(png) > 5000, fid


def test_proposal_numbers_equal_the_store(built):
    camp, proposed = built["campaign"], built["proposed"]
    stored = camp.proposals(proposed.number).set_index("candidate_id")
    doc = parse(built["html"])
    rows = [a["data-id"] for t, a in doc.tags if t == "tr" and "data-id" in a]
    assert rows == list(stored.index)  # same candidates, in rank order
    cells = [a for t, a in doc.tags if t == "td" and "data-field" in a]
    assert len(cells) == 3 * len(stored)
    for cid, cell in zip(np.repeat(rows, 3), cells):
        assert float(cell["data-value"]) == stored.loc[cid, cell["data-field"]]


def test_summary_numbers_equal_the_round(built):
    proposed, camp = built["proposed"], built["campaign"]
    doc = parse(built["html"])
    by_id = {a["id"]: a for t, a in doc.tags if "id" in a}
    assert float(by_id["expected-hits"]["data-value"]) == proposed.expected_hits
    interval = by_id["expected-hits-interval"]
    assert (float(interval["data-low"]), float(interval["data-high"])) == proposed.expected_hits_interval
    assert int(by_id["n-picks"]["data-value"]) == len(proposed.table)
    record = json.loads((proposed.folder / "round.json").read_text())
    assert float(by_id["expected-hits"]["data-value"]) == record["expected_hits"]
    status = camp.status().as_dict()
    counts = {a["data-key"]: int(a["data-value"]) for t, a in doc.tags if "data-key" in a}
    assert counts and all(counts[k] == status[k] for k in counts)
    spent = float(by_id["spent"]["data-value"])
    assert spent == pytest.approx(camp.labels()["core_hours"].sum())


@pytest.fixture(scope="module")
def collected(built):
    return collect(built["campaign"], use_open=False)


def test_random_baseline_spends_the_same_core_hours(collected):
    data = collected
    r = data.round
    assert r.random_expected_hits == pytest.approx(r.random_hits_per_core_hour
                                                   * r.total_cost_core_hours)
    # every pick is in the pool, the pool holds no labelled candidate
    assert r.pool_size >= r.n_picks
    assert r.pool_size <= data.status.candidates - data.status.labelled
    assert r.hits_per_core_hour == pytest.approx(r.expected_hits / r.total_cost_core_hours)


def test_cv_table_shows_the_trained_models_metrics(built):
    cv = built["trained"].cv_table
    text = "".join(parse(built["html"]).text)
    assert f"{cv.loc['mean', 'roc_auc']:.3f}" in text
    assert f"{cv.loc['pooled', 'pr_auc']:.3f}" in text


def test_cautions_and_scale_are_stated(built):
    text = " ".join(parse(built["html"]).text)
    for caution in CAUTIONS:
        assert caution in text
    assert "not a topological classification" in text
    assert "Z2" in text and "Wilson loops" in text
    assert SAFETY_NOTE in text
    assert "log-odds" in text and "1 / (1 + exp(" in text


def test_provenance_lists_licences(built):
    text = " ".join(parse(built["html"]).text)
    assert "Magpie" in text and "BSD" in text
    assert "GPAW" in text and "GPL-3.0" in text  # the synthetic results name GPAW as code
    assert "CC-BY-4.0" not in text  # the model was trained without data_open


def test_open_data_provenance_when_used(built, collected):
    base = collected
    with_open = collect(built["campaign"], use_open=True, validation=base.validation)
    licences = {p.licence for p in with_open.provenance}
    assert "CC-BY-4.0" in licences
    assert "CC-BY-4.0" not in {p.licence for p in base.provenance}


def test_self_contained_no_external_urls_no_script(built):
    html = built["html"]
    assert not re.search(r"(?i)\b(?:https?|ftp)://", html)
    assert not re.search(r"""(?i)(?:src|href)\s*=\s*["']//""", html)
    assert "<script" not in html.lower()
    assert "<link" not in html.lower()


def test_unknown_round_and_no_round(built, tmp_path):
    with pytest.raises(InputError, match="no such round"):
        build_report(built["campaign"], round_number=99, out_path=tmp_path / "r.html")
    empty = Campaign.create(tmp_path / "empty")
    with pytest.raises(CampaignError, match="no round"):
        build_report(empty, out_path=tmp_path / "r.html")
    empty.close()
    assert not (tmp_path / "r.html").exists()


def test_an_earlier_round_keeps_the_pool_figures_it_was_proposed_on(tmp_path):
    from prescreen.acquire.rounds import rank, train
    from prescreen.report.build import _pool_mask

    camp, proposed, _ = build_small_campaign(tmp_path / "camp", seed=1)
    path = proposed.folder / "round.json"
    record = json.loads(path.read_text())
    # a later model with other settings changes today's probabilities
    train(camp, use_open=False, n_models=2, campaign_weight=3.0, random_state=7, progress=False)
    data = collect(camp, round_number=proposed.number, use_open=False)
    at = record["pool_at_proposal"]
    assert data.round.pool_size == at["size"]
    assert data.round.pool_base_rate == at["base_rate"]
    assert data.round.random_hits_per_core_hour == at["random_hits_per_core_hour"]
    for row in data.proposals:
        assert row.cost_low == record["picks"][row.id]["cost_low"]
    ranked = rank(camp, progress=False)
    pool = ranked[_pool_mask(ranked, set(camp.pending_ids()), set(proposed.table.index))]
    assert float(pool["probability"].mean()) != at["base_rate"]  # so the check can fail
    assert not any("recomputed" in n for n in data.notes)

    # a round written before the pool was recorded: recomputed, and the report says so
    del record["pool_at_proposal"]
    path.write_text(json.dumps(record))
    old = collect(camp, round_number=proposed.number, use_open=False,
                  validation=data.validation)
    assert old.round.pool_base_rate == pytest.approx(float(pool["probability"].mean()))
    assert any("recomputed with today's model" in n for n in old.notes)
    camp.close()


def test_validation_rebuilds_the_table_with_the_models_training_settings(built):
    from prescreen.acquire.rounds import load_model
    from prescreen.report.build import _model_settings, _validation, round_model_settings

    camp = built["campaign"]
    model, version = load_model(camp)
    settings = _model_settings(camp, version)
    assert settings["use_open"] is False and settings["campaign_filter"] == {}
    assert round_model_settings(camp) == settings  # the round was proposed with this model
    n = len(camp.labels())
    kept, notes = _validation(camp, model, None, False, False,
                              settings={**settings, "campaign_filter": {"code": "GPAW"}},
                              training_rows=n)
    assert notes == [] and len(kept.y) == n
    none, notes = _validation(camp, model, None, False, False,
                              settings={**settings, "campaign_filter": {"code": "VASP"}})
    assert none is None and notes[0].startswith("validation left out")
    # labels added since training: the stored per-fold table is older, and the note says so
    _, notes = _validation(camp, model, None, False, False, settings=settings,
                           training_rows=n - 3)
    assert notes == [f"the model was trained on {n - 3} rows and the labelled data now has {n}: "
                     "the per-fold table is the model's own, from training; the curves and "
                     "the enrichment use today's rows"]


def test_training_hits_are_split_by_band_gap(built, collected):
    # the synthetic results of build_small_campaign record no gap: every hit is "unknown"
    doc = parse(built["html"])
    line = next(a for t, a in doc.tags if a.get("id") == "hits-by-gap")
    hits = int(collected.validation.y.sum())
    assert (int(line["data-gapped"]), int(line["data-metallic"]), int(line["data-unknown"])) == (0, 0, hits)
    from prescreen.physics.dft import METAL_GAP_EV
    from prescreen.report.build import ValidationData

    v = ValidationData(y=np.array([1, 1, 1, 0]), p_oof=np.zeros(4), cv_table=None,
                       gap_soc_eV=np.array([0.0, 0.5, np.nan, 0.0]))
    assert v.hits_by_gap() == {"hits": 3, "gapped": 1, "metallic": 1, "unknown": 1,
                               "metal_gap_eV": METAL_GAP_EV}


def test_labelled_hit_fraction_follows_the_models_rule():
    import pandas as pd

    from prescreen.report.build import _labelled_hit_fraction

    labels = pd.DataFrame({"spillage": [0.9, 0.9, 0.1, 0.7],
                           "gap_soc_eV": [0.0, 0.3, 1.0, None]})
    assert _labelled_hit_fraction(labels, 0.5, None) == 0.75
    assert _labelled_hit_fraction(labels, 0.5, 0.02) == 0.25  # the metal and the unknown drop
    assert np.isnan(_labelled_hit_fraction(labels.iloc[:0], 0.5, None))


def test_invariants_written_by_z2_are_shown_with_the_spillage(built, collected, tmp_path):
    from prescreen.invariants import INVARIANTS_FILE

    camp = built["campaign"]
    labelled = camp.labels().index[0]
    path = camp.path / INVARIANTS_FILE
    path.write_text("id,formula,z2,delta,direct_gap_soc_eV,kmesh,parity_error,wall_s,status,"
                    f"reason,method,wilson_loops\n{labelled},X,1,-1 +1 +1 +1,0.5908,6x6x1,4e-15,"
                    "20,ok,,parity,\nother,MoS2,,,,,,,refused,the structure has no inversion "
                    "centre,parity,\nloops,MoS2,0,,1.6,6x6x1,,90,ok,,wilson,3x24\n")
    # the flow file as `prescreen z2` writes it (the shape of a trivial flow; the plot is
    # what is checked, not the numbers)
    from prescreen.invariants import FLOWS_DIR
    from prescreen.physics.wilson import WilsonZ2

    flow = WilsonZ2(id="loops", formula="MoS2", z2=0, k2=(0.0, 0.25, 0.5),
                    wcc=((0.1, 0.2),) * 3, gap_centres=(0.6,) * 3, direct_gap_soc_eV=1.6,
                    min_link=0.7, n_occupied=2, nk1=24, kmesh=(6, 6, 1))
    (camp.path / FLOWS_DIR).mkdir()
    (camp.path / FLOWS_DIR / "loops.json").write_text(json.dumps(flow.as_dict()))
    try:
        out = build_report(camp, out_path=tmp_path / "r.html", validation=collected.validation)
    finally:
        path.unlink()
        shutil.rmtree(camp.path / FLOWS_DIR)
    doc = parse(out.read_text(encoding="utf-8"))
    rows = {a["data-id"]: a for t, a in doc.tags if t == "tr" and "data-z2" in a}
    assert rows[labelled]["data-z2"] == "1" and rows["other"]["data-z2"] == ""
    text = " ".join(doc.text)
    assert f"{camp.labels().loc[labelled, 'spillage']:.3f}" in text
    assert "the structure has no inversion centre" in text
    assert "Wilson loops, 3 lines of 24 k points" in text and "parities -1 +1 +1 +1" in text
    imgs = {a["id"]: a for t, a in doc.tags if t == "img" and "id" in a}
    assert imgs["fig-z2-flow-loops"]["src"].startswith("data:image/png;base64,")
    assert not any(i.startswith("fig-z2-flow-") and i != "fig-z2-flow-loops" for i in imgs)


def test_a_hit_is_what_the_rounds_model_was_trained_on(built, tmp_path):
    # A campaign whose threshold changed after training: the probabilities are still
    # P(spillage >= the model's threshold), so the report must say so and validate that.
    import sqlite3

    shutil.copytree(built["campaign"].path, tmp_path / "copy")
    with sqlite3.connect(tmp_path / "copy" / "campaign.sqlite") as conn:
        conn.execute("UPDATE meta SET value='0.3' WHERE key='threshold'")
    with Campaign.open(tmp_path / "copy") as camp:
        data = collect(camp, use_open=False)
        labels = camp.labels()
    assert data.positive_rule == "spillage >= 0.5"
    assert any("threshold is 0.3" in note for note in data.notes)
    assert data.labelled_base_rate == pytest.approx(float((labels["spillage"] >= 0.5).mean()))
    assert data.validation.y.sum() == int((labels["spillage"] >= 0.5).sum())


def test_budget_overrun_probability_matches_the_log_normal_law():
    # One candidate, or all errors moving together: the total is log-normal, and
    # scipy.stats.lognorm gives the exact tail (Monte Carlo tolerance ~4 standard errors).
    from scipy import stats

    from prescreen.report.build import budget_overrun_probability

    z = stats.norm.ppf(0.95)
    sigma = 0.4
    cost, low, high = np.array([2.0, 1.0, 3.0]), None, None
    low, high = cost * np.exp(-z * sigma), cost * np.exp(z * sigma)
    for budget in (5.0, 6.0, 8.0):
        exact = stats.lognorm.sf(budget, s=sigma, scale=cost.sum())
        got = budget_overrun_probability(cost, low, high, budget, correlated=True)
        assert got == pytest.approx(exact, abs=0.015)
        one = budget_overrun_probability(cost[:1], low[:1], high[:1], budget / 3)
        assert one == pytest.approx(stats.lognorm.sf(budget / 3, s=sigma, scale=2.0), abs=0.015)
    # independent errors partly cancel: a budget above the median total is overrun less often
    assert (budget_overrun_probability(cost, low, high, 7.0)
            < budget_overrun_probability(cost, low, high, 7.0, correlated=True))


def test_roc_auc_interval_brackets_scikit_learns_value():
    from sklearn.metrics import roc_auc_score

    from prescreen.report.build import roc_auc_interval

    rng = np.random.default_rng(0)
    y = rng.integers(0, 2, 80)
    p = np.clip(0.3 * y + rng.random(80) * 0.7, 0, 1)
    out = roc_auc_interval(y, p)
    assert out["roc_auc"] == pytest.approx(roc_auc_score(y, p))
    # the vectorised resample AUCs equal scikit-learn's, ties included
    from prescreen.report.build import _auc_rows

    idx = np.random.default_rng(1).integers(0, 80, (5, 80))
    coarse = np.round(p, 1)  # many ties
    np.testing.assert_allclose(_auc_rows(y[idx], coarse[idx]),
                               [roc_auc_score(y[i], coarse[i]) for i in idx])
    assert out["low"] < out["roc_auc"] < out["high"]
    assert np.isnan(roc_auc_interval(np.ones(5), np.linspace(0, 1, 5))["roc_auc"])


def test_summary_shows_skill_cheapest_first_and_overrun(built, collected):
    doc = parse(built["html"])
    by_id = {a["id"]: a for t, a in doc.tags if "id" in a}
    record = json.loads((built["proposed"].folder / "round.json").read_text())
    at = record["pool_at_proposal"]
    assert float(by_id["cheapest-first"]["data-value"]) == at["cheapest_first_expected_hits"]
    assert at["cheapest_first_picks"] > 0
    skill = collected.skill
    from sklearn.metrics import roc_auc_score

    v = collected.validation
    assert skill["roc_auc"] == pytest.approx(roc_auc_score(v.y, v.p_oof))
    assert 0.0 <= float(by_id["overrun"]["data-value"]) <= 1.0
    assert "no-replay" not in by_id  # this report has discovery curves


def test_discovery_caption_states_the_replayed_pool_and_the_runs_to_half(built):
    from prescreen.acquire.replay import random_runs_to_fraction, runs_to_fraction

    replay = small_replay(built["campaign"])  # the same seeded replay as the report's
    html = built["html"]
    caption = html[html.index('id="fig-discovery"'):]
    caption = caption[:caption.index("</figcaption>")]
    n, p = int(replay.y.size), int(replay.y.sum())
    assert f"Replayed on {n} labelled rows with {p} positives" in caption
    per_seed = [runs_to_fraction(g.sort_values("n_runs"), p, 0.5)
                for _, g in replay.curves.groupby("seed")]
    median = float(np.median(per_seed))
    assert (f"random_selection: {median:.0f} evaluations" in caption if np.isfinite(median)
            else "random_selection: not reached" in caption)
    assert f"expected to need {random_runs_to_fraction(n, p, 0.5):.0f} evaluations" in caption


def test_picks_scored_like_known_non_hits_are_counted(built, collected):
    from prescreen.acquire.rounds import _feature_columns, candidate_features, load_model

    camp = built["campaign"]
    labels = camp.labels()

    clf, _ = load_model(camp)
    feats = _feature_columns(candidate_features(camp, progress=False))
    negatives = labels.index[labels["spillage"] < camp.threshold]
    ceiling = clf.predict_proba(feats.loc[negatives])[:, 1].max()
    assert collected.negative_ceiling == pytest.approx(ceiling)
    assert collected.picks_at_or_below_negatives == sum(
        r.probability <= ceiling for r in collected.proposals)


def test_the_importance_caption_says_correlation_and_ranks_the_spin_orbit_features(built):
    from prescreen.report.render import _proxy_note

    data = collect(built["campaign"], use_open=False)
    ge = data.global_explanation
    order = list(np.argsort(-ge.importance(), kind="stable"))
    first_soc = next(k for k in order if ge.feature_names[k].startswith("soc "))
    note = _proxy_note(ge, data)
    assert f"is {order.index(first_soc) + 1} of {len(order)}." in note
    assert "These are correlations the model learned from" in note
    assert note.strip() in " ".join(" ".join(parse(built["html"]).text).split())


def test_the_cost_table_states_the_campaigns_level_of_theory(built, tmp_path):
    from prescreen.physics.dft import LabelSettings

    camp = built["campaign"]
    assert not camp.label_settings_fixed  # results ingested, none computed here
    text = "".join(parse(built["html"]).text)
    assert LabelSettings().describe() + " (the defaults" in text
    # once a run fixes other settings, the report states those
    fixed = LabelSettings(kpt_density=7.0, basis="szp(dzp)")
    camp.labels_dir.mkdir()
    (camp.labels_dir / "settings.json").write_text(json.dumps(fixed.as_dict()))
    try:
        html = build_report(camp, out_path=tmp_path / "r.html").read_text(encoding="utf-8")
    finally:
        (camp.labels_dir / "settings.json").unlink()
        camp.labels_dir.rmdir()
    text = "".join(parse(html).text)
    assert "GPAW LCAO szp(dzp) basis, a Gamma-centred k mesh of 7 points" in text
    assert "(fixed by the campaign's first run of prescreen label)" in text
