"""A campaign round end to end: features -> model -> ranking -> proposal -> label -> ingest.

The labels here come from a stated rule, not from DFT: they only exercise the plumbing
(no test below compares a number with a reference value). The physics of spillage is
tested in test_spillage.py, test_tightbinding_models.py and test_dft.py.
"""

from __future__ import annotations

import itertools
import json
import os
import time

import numpy as np
import pandas as pd
import pytest
from ase.build import mx2
from pymatgen.io.ase import AseAtomsAdaptor

from prescreen.acquire import rounds
from prescreen.campaign import Campaign
from prescreen.candidate import Candidate
from prescreen.errors import CampaignError, InputError
from prescreen.io.results import ResultRow
from prescreen.physics.dft import LabelRecord

METALS = ["Mo", "W", "Ti", "Zr", "Hf", "Nb", "Ta", "Pt", "Pd", "Sn"]
CHALCOGENS = ["S", "Se", "Te"]
#: The plumbing rule: "positive" when the heaviest element is beyond Z = 72. A stand-in
#: with both classes present, not a physical claim.
HEAVY_Z = 72


def _structures():
    out = []
    for (m, x), kind in itertools.product(itertools.product(METALS, CHALCOGENS), ("2H", "1T")):
        atoms = mx2(f"{m}{x}2", kind, a=3.3, thickness=3.2, vacuum=9.0)
        out.append((f"{m}{x}2-{kind}", f"{m}{x}2", AseAtomsAdaptor.get_structure(atoms)))
    return out


def _new_campaign(path):
    """A campaign with the unfitted default cost model, so costs do not depend on data_open."""
    from prescreen.acquire.cost import CostModel

    camp = Campaign.create(path, name="rounds-test")
    CostModel().save(camp.path / "cost_model.json")
    return camp


def _budget(ranking, fraction):
    """A budget covering ``fraction`` of the cost of every proposable candidate."""
    return float(fraction * ranking["cost_core_hours"].sum())


def _rule(structure) -> float:
    return 0.9 if max(site.specie.Z for site in structure) > HEAVY_Z else 0.05


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """A campaign of 60 dichalcogenides, half of them labelled by the rule, trained once."""
    path = tmp_path_factory.mktemp("round") / "camp"
    camp = _new_campaign(path)
    items = _structures()
    camp.add_candidates([Candidate(cid, f, f"gen:{i}", s) for i, (cid, f, s) in enumerate(items)]
                        + [Candidate("f-only", "Bi2Se3", "wish.csv:2")])
    labelled = items[::2]
    rows = [ResultRow(id=cid, spillage=_rule(s), functional="PBE", code="rule", kmesh=None,
                      core_hours=None, notes=None, source=f"rule.csv:{i + 2}")
            for i, (cid, _, s) in enumerate(labelled)]
    camp.ingest_results((rows, []))
    result = rounds.train(camp, use_open=False, n_models=2, progress=False)
    yield camp, result
    camp.close()


def test_train_records_a_versioned_model_with_grouped_cv(trained):
    camp, result = trained
    assert result.version == "model-001"
    assert (result.path / "metadata.json").is_file()
    assert camp.latest_model()["version"] == "model-001"
    assert {"roc_auc", "brier"} <= set(result.metrics)
    assert list(result.cv_table.index[-3:]) == ["mean", "std", "pooled"]


def test_rank_scores_every_candidate_once(trained):
    camp, _ = trained
    table = rounds.rank(camp, progress=False)
    assert sorted(table.index) == sorted(camp.candidate_ids())
    assert list(table["rank"]) == list(range(1, len(table) + 1))
    assert table["probability"].is_monotonic_decreasing
    assert table["probability"].between(0, 1).all() and (table["uncertainty"] >= 0).all()
    # A formula-only candidate is ranked but has no cost (nothing to compute yet).
    assert np.isnan(table.loc["f-only", "cost_core_hours"])
    assert "no structure" in table.loc["f-only", "flags"]
    assert table.attrs["positive_rule"] == f"spillage >= {camp.threshold:g}"  # no gap required
    # Labelled rows say so, with their value; the model's own grouped CV comes along.
    labels = camp.labels()["spillage"]
    for cid, value in labels.items():
        assert f"labelled: spillage {value:.2f}" in table.loc[cid, "flags"]
    assert not table.drop(index=labels.index)["flags"].str.contains("labelled").any()
    record = camp.model_record(table["model"].iloc[0])
    assert table.attrs["cv_roc_auc"] == record["metrics"]["roc_auc"]
    assert table.attrs["cv_rows"] == pytest.approx(len(labels))


def test_propose_respects_budget_exclusions_and_seed(trained, tmp_path):
    camp, _ = trained
    ranking = rounds.rank(camp, progress=False)
    budget = _budget(ranking, 0.1)
    first = rounds.propose(camp, budget_core_hours=budget, seed=3, ranking=ranking,
                           progress=False)
    picked = list(first.table.index)
    assert picked and first.total_cost <= budget
    labelled = set(camp.labels().index)
    assert not (set(picked) & labelled) and "f-only" not in picked
    assert sorted(os.listdir(first.folder / "cif")) == sorted(f"{c}.cif" for c in picked)
    meta = json.loads((first.folder / "round.json").read_text())
    assert meta["round"] == first.number and meta["seed"] == 3
    # Pending proposals stay out of the next batch.
    second = rounds.propose(camp, budget_core_hours=budget, seed=3, ranking=ranking,
                            progress=False)
    assert not set(second.table.index) & set(picked)


def test_same_seed_same_proposal_bit_for_bit(tmp_path):
    def run() -> pd.DataFrame:
        camp = _new_campaign(tmp_path / f"c{time.perf_counter_ns()}")
        items = _structures()
        camp.add_candidates([Candidate(c, f, "gen", s) for c, f, s in items])
        camp.ingest_results(([ResultRow(id=c, spillage=_rule(s), functional=None, code=None,
                                         kmesh=None, core_hours=None, notes=None,
                                         source=f"r:{i}")
                              for i, (c, _, s) in enumerate(items[::2])], []))
        rounds.train(camp, use_open=False, n_models=2, progress=False)
        budget = _budget(rounds.rank(camp, progress=False), 0.2)
        table = rounds.propose(camp, budget_core_hours=budget, strategy="thompson_sampling",
                               seed=11, progress=False).table
        camp.close()
        return table

    pd.testing.assert_frame_equal(run(), run(), check_exact=True)


def test_a_ranking_is_written_as_csv_and_parquet_with_the_same_rows(trained, tmp_path):
    import pandas as pd

    camp, _ = trained
    table = rounds.rank(camp, progress=False)
    csv_path, parquet_path = rounds.write_ranking(table, tmp_path / "out" / "ranking")
    from_csv = pd.read_csv(csv_path, index_col=0)
    from_parquet = pd.read_parquet(parquet_path)
    assert list(from_csv.index) == list(from_parquet.index) == list(table.index)
    assert np.allclose(from_csv["probability"], table["probability"])
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["ranking.csv",
                                                                    "ranking.parquet"]


def test_an_empty_campaign_is_a_clear_error_for_rank_and_propose(tmp_path):
    camp = _new_campaign(tmp_path / "empty")
    with pytest.raises(CampaignError, match="no candidates yet.*prescreen add"):
        rounds.rank(camp, progress=False)
    with pytest.raises(CampaignError, match="no candidates yet"):
        rounds.propose(camp, budget_core_hours=1.0, progress=False)
    camp.close()


def test_a_campaign_without_results_is_ranked_and_proposed_from(tmp_path):
    # with the shipped default model, before any DFT result is ingested
    camp = _new_campaign(tmp_path / "fresh")
    camp.add_candidates([Candidate(c, f, "gen", s) for c, f, s in _structures()[:6]])
    table = rounds.rank(camp, progress=False)
    assert len(table) == 6 and not table["flags"].str.contains("labelled").any()
    assert table["spillage"].isna().all() and table["spillage"].dtype == float
    rnd = rounds.propose(camp, budget_core_hours=_budget(table, 0.5), ranking=table,
                         progress=False)
    assert len(rnd.table)
    camp.close()


def test_unknown_strategy_names_the_choices():
    with pytest.raises(InputError, match="unknown strategy.*greedy_probability"):
        rounds.strategy_by_name("best_guess")
    with pytest.raises(InputError, match="schedule of two strategies"):
        rounds.strategy_by_name("two_phase")


def test_random_selection_runs_without_a_diversity_weight_and_refuses_one(trained):
    camp, _ = trained
    ranking = rounds.rank(camp, progress=False)
    budget = _budget(ranking, 0.1)
    before = camp.status().rounds
    rnd = rounds.propose(camp, budget_core_hours=budget, strategy="random_selection",
                         ranking=ranking, progress=False)
    assert len(rnd.table) and rnd.total_cost <= budget
    assert json.loads((rnd.folder / "round.json").read_text())["strategy"] == "random_selection"
    with pytest.raises(InputError, match="takes no diversity weight"):
        rounds.propose(camp, budget_core_hours=budget, strategy="random_selection",
                       diversity=0.3, ranking=ranking, progress=False)
    assert camp.status().rounds == before + 1  # the refusal recorded nothing


@pytest.mark.parametrize("bad", [-1.0, float("nan"), 5.0])
def test_a_diversity_weight_outside_zero_to_one_is_refused(trained, bad):
    camp, _ = trained
    with pytest.raises(InputError, match=r"bad diversity.*\[0, 1\]"):
        rounds.propose(camp, budget_core_hours=1.0, diversity=bad, progress=False)


def test_a_budget_below_every_candidate_records_nothing(trained):
    camp, _ = trained
    ranking = rounds.rank(camp, progress=False)
    cheapest = float(ranking["cost_core_hours"].min())
    before = camp.status().rounds
    with pytest.raises(InputError, match="below the predicted cost.*cheapest candidate"):
        rounds.propose(camp, budget_core_hours=cheapest / 10, ranking=ranking, progress=False)
    assert camp.status().rounds == before


#: A timeout above any predicted cost of these campaigns (the unfitted default cost
#: model's placeholder scale), so that the too-slow warning stays out of the way.
LONG = 1e7


@pytest.fixture
def fresh_round(tmp_path):
    """A campaign of six candidates with one round proposed by the shipped default model
    (kept apart from ``trained``, whose pool the other tests count)."""
    camp = _new_campaign(tmp_path / "fresh")
    camp.add_candidates([Candidate(c, f, "gen", s) for c, f, s in _structures()[:6]])
    rounds.propose(camp, budget_core_hours=_budget(rounds.rank(camp, progress=False), 0.5),
                   progress=False)
    yield camp
    camp.close()


def test_a_timeout_below_the_predicted_cost_is_warned_about(fresh_round):
    from prescreen.errors import PrescreenWarning

    camp = fresh_round
    cid = camp.pending_ids()[0]
    cost = float(camp.proposals().set_index("candidate_id").loc[cid, "cost_core_hours"])
    with pytest.warns(PrescreenWarning, match=f"more than the .* timeout \\({cid}"):
        rounds.label_pending(camp, ids=[cid], compute=rule_compute,
                             timeout_s=cost * 3600 / 2, progress=False)


def rule_compute(structure, settings, *, id=None):
    """Stand-in for the DFT calculation (spawned worker): the plumbing rule as a record."""
    gamma = np.array([0.0, _rule(structure)])
    kpts = np.zeros((2, 3))
    return LabelRecord(id=id, formula=structure.composition.formula, spillage=gamma.max(),
                       k_max=kpts[1], gap_nosoc_eV=1.0, gap_soc_eV=0.9, is_metal=False,
                       magmom=0.0, settings={**settings.as_dict(), "kmesh": [3, 3, 1]},
                       versions={"gpaw": "stand-in"}, wall_s=0.01, core_hours=0.01 / 3600,
                       gamma=gamma, kpts=kpts, direct_gap_soc_eV=1.1)


def test_label_pending_ingests_and_clears_pending(trained):
    camp, _ = trained
    pending = camp.pending_ids()
    if not pending:
        rounds.propose(camp, budget_core_hours=_budget(rounds.rank(camp, progress=False), 0.1),
                       progress=False)
        pending = camp.pending_ids()
    out = rounds.label_pending(camp, ids=pending[:2], compute=rule_compute, timeout_s=LONG,
                               progress=False)
    assert (out.n_jobs, out.n_ok, out.n_ingested) == (2, 2, 2)
    assert set(pending[:2]) <= set(camp.labels().index)
    stored = camp.labels().loc[pending[:2], ["gap_soc_eV", "direct_gap_soc_eV"]]
    assert stored.to_numpy().tolist() == [[0.9, 1.1]] * 2  # the record's gaps, as computed
    assert not set(pending[:2]) & set(camp.pending_ids())
    # naming them again would recompute results that cannot be stored: refused up front
    with pytest.raises(InputError, match="already have a result"):
        rounds.label_pending(camp, ids=pending[:2], compute=rule_compute, timeout_s=LONG,
                               progress=False)


def test_the_first_label_run_fixes_the_campaigns_level_of_theory(fresh_round):
    from prescreen.acquire.cost import kpoints_for_cell
    from prescreen.physics.dft import LabelSettings

    camp = fresh_round
    assert camp.label_settings() == LabelSettings()  # nothing computed yet: the defaults
    denser = camp.label_settings(kpt_density=7.0, smearing_eV=None)  # None: not asked
    assert (denser.kpt_density, denser.smearing_eV) == (7.0, LabelSettings().smearing_eV)
    first, second = camp.pending_ids()[:2]
    rounds.label_pending(camp, ids=[first], compute=rule_compute, timeout_s=LONG,
                         settings=denser, progress=False)
    assert camp.label_settings() == denser and camp.label_settings(kpt_density=7) == denser
    with pytest.raises(InputError, match=r"settings\.json: asked for kpt_density=5\.0, but .*"
                       r"computed with kpt_density=7\.0"):
        camp.label_settings(kpt_density=5.0)
    # without settings a later run takes the fixed ones, and so does the record
    rounds.label_pending(camp, ids=[second], compute=rule_compute, timeout_s=LONG,
                         progress=False)
    from prescreen.physics.labeller import load_records

    assert {r.settings["kpt_density"] for r in load_records(camp.labels_dir)} == {7.0}
    # costs count k-points on the campaign's mesh, in a cache of its own
    assert rounds.cost_kpoints(camp) == {"kpoint_density": 7.0}
    ranking = rounds.rank(camp, progress=False)
    cached = pd.read_parquet(camp.path / "features" / "cost-descriptors-1-k7.parquet")
    s = camp.structure(first)
    assert cached.loc[first, "n_kpoints"] == kpoints_for_cell(s, 7.0) > kpoints_for_cell(s, 5.0)
    assert np.isfinite(ranking.loc[first, "cost_core_hours"])


def test_an_explicit_mesh_is_what_the_costs_count(fresh_round):
    from prescreen.physics.dft import LabelSettings

    camp = fresh_round
    rounds.label_pending(camp, ids=camp.pending_ids()[:1], compute=rule_compute,
                         timeout_s=LONG, settings=LabelSettings(kpts=(12, 12, 1)),
                         progress=False)
    assert rounds.cost_kpoints(camp) == {"kmesh": (12, 12, 1)}
    rounds.rank(camp, progress=False)
    cached = pd.read_parquet(camp.path / "features" / "cost-descriptors-1-m12x12.parquet")
    assert (cached["n_kpoints"] == 144).all()
    # a later run asking for other settings is refused in the campaign's words
    with pytest.raises(InputError, match="start a new campaign"):
        rounds.label_pending(camp, ids=camp.pending_ids()[:1], compute=rule_compute,
                             timeout_s=LONG, settings=LabelSettings(), progress=False)


def failing_compute(structure, settings, *, id=None):
    """Stand-in for a calculation that dies (a timeout, say)."""
    raise RuntimeError("stand-in failure")


def test_a_failed_calculation_is_computed_again_only_when_asked(fresh_round):
    camp = fresh_round
    cid = camp.pending_ids()[0]
    first = rounds.label_pending(camp, ids=[cid], compute=failing_compute, timeout_s=LONG,
                                 progress=False)
    assert (first.n_ok, first.n_failed) == (0, 1) and "stand-in failure" in first.failures[0][1]
    again = rounds.label_pending(camp, ids=[cid], compute=rule_compute, timeout_s=LONG,
                                 progress=False)
    assert (again.n_ok, again.n_failed, again.n_ingested) == (0, 1, 0)  # not "labelled"
    retried = rounds.label_pending(camp, ids=[cid], compute=rule_compute, retry_failed=True,
                                   timeout_s=LONG,
                                   progress=False)
    assert (retried.n_ok, retried.n_failed, retried.n_ingested) == (1, 0, 1)
    assert cid in camp.labels().index and cid not in camp.pending_ids()


def test_one_class_training_data_is_a_clear_error(tmp_path):
    camp = _new_campaign(tmp_path / "one")
    items = _structures()[:6]
    camp.add_candidates([Candidate(c, f, "gen", s) for c, f, s in items])
    camp.ingest_results(([ResultRow(id=c, spillage=0.0, functional=None, code=None, kmesh=None,
                                    core_hours=None, notes=None, source=f"r:{i}")
                          for i, (c, _, _) in enumerate(items)], []))
    with pytest.raises(CampaignError, match="only one class"):
        rounds.train(camp, use_open=False, progress=False)


def test_round_records_the_stop_rule_over_the_pool_it_leaves(trained):
    camp, _ = trained
    ranking = rounds.rank(camp, progress=False)
    rnd = rounds.propose(camp, budget_core_hours=_budget(ranking, 0.05), seed=5,
                         ranking=ranking, progress=False)
    meta = json.loads((rnd.folder / "round.json").read_text())
    after = meta["after_this_round"]
    left = ranking[ranking["layer_status"].isin(rounds.PROPOSABLE_STATUSES)
                   & ranking["duplicate_of"].isna() & ranking["spillage"].isna()
                   & ~ranking.index.isin(camp.pending_ids())]
    # Expected hits left = sum of calibrated probabilities of what is still unpicked.
    assert after["n_pool"] == len(left)
    assert after["expected_hits_left"] == pytest.approx(left["probability"].sum())
    assert after["hits_left_low"] <= after["expected_hits_left"] <= after["hits_left_high"]
    assert after == rnd.after
    # a hit worth less than the expected cost of the next one: the rule says stop
    cheap = rounds.propose(camp, budget_core_hours=_budget(ranking, 0.05), seed=5,
                           max_core_hours_per_hit=after["core_hours_to_next_hit"] / 100,
                           progress=False)
    assert cheap.after["advice"].startswith("stop: the next hit is expected to cost")


def test_campaign_filter_keeps_matching_results_only(trained):
    camp, _ = trained
    everything = rounds.training_table(camp, use_open=False, progress=False)
    # The plumbing labels were ingested with functional "PBE" and code "rule"; results
    # from the stand-in labeller carry code "GPAW stand-in".
    kept = rounds.training_table(camp, use_open=False, progress=False,
                                 campaign_filter={"code": "rule"})
    labels = camp.labels()
    assert len(kept) == int((labels["code"] == "rule").sum()) <= len(everything)
    with pytest.raises(InputError, match="unknown result filter"):
        rounds.training_table(camp, use_open=False, progress=False,
                              campaign_filter={"basis": "dzp"})


@pytest.mark.parametrize("code, shape", [
    ("theirs", "plane-wave shape"),
    ("GPAW 26.7.0", "LCAO shape"),  # the built-in labeller in its default LCAO mode
    ("GPAW 26.7.0" + rounds.PW_CODE_SUFFIX, "plane-wave shape"),
])
def test_cost_model_prefers_the_campaigns_own_recorded_costs(tmp_path, code, shape):
    camp = Campaign.create(tmp_path / "costs")
    items = _structures()[:8]
    camp.add_candidates([Candidate(c, f, "gen", s) for c, f, s in items])
    hours = [0.5, 0.7, 1.1, 0.9, 2.0, 1.4]
    camp.ingest_results(([ResultRow(id=c, spillage=0.0, functional="PBE", code=code,
                                    kmesh=None, core_hours=h, notes=None, source=f"r:{i}")
                          for i, ((c, _, _), h) in enumerate(zip(items, hours))], []))
    empty = tmp_path / "no_open_data"
    empty.mkdir()
    model, source = rounds.cost_model_with_source(camp, data_open=empty)
    assert model.n_fitted == len(hours) and shape in source
    # With a cost_model.json in the folder, that file wins.
    from prescreen.acquire.cost import CostModel

    CostModel().scaled(3.0).save(camp.path / "cost_model.json")
    assert rounds.cost_model(camp, data_open=empty).multiplier == 3.0
    camp.close()


def test_replay_for_the_report(trained):
    camp, _ = trained
    assert rounds.replay_labelled(camp, use_open=False, progress=False) is None  # too few
    rep = rounds.replay_labelled(camp, use_open=False, min_rows=10, min_positives=2,
                                 seeds=(0,), n_models=2, n_rounds=2, progress=False)
    table = rounds.training_table(camp, use_open=False, progress=False)
    assert len(rep.y) == len(table) and int(rep.y.sum()) == int(table.y.sum())
    assert set(rep.curves["strategy"]) == {*rounds.REPLAY_STRATEGIES, "random_selection"}
    # Hits found never exceed the positives; each replayed row is evaluated at most once.
    assert rep.curves["hits"].max() <= rep.y.sum()
    for _, block in rep.curves.groupby(["strategy", "seed"]):
        assert block["item"].is_unique


def test_retrain_after_a_first_small_batch(tmp_path):
    # The walkthrough's step 7: a few dozen labelled rows, two rows per leaf, bagging on.
    camp = _new_campaign(tmp_path / "small")
    items = _structures()[:24]
    camp.add_candidates([Candidate(c, f, "gen", s) for c, f, s in items])
    camp.ingest_results(([ResultRow(id=c, spillage=_rule(s), functional=None, code=None,
                                    kmesh=None, core_hours=None, notes=None, source=f"r:{i}")
                          for i, (c, _, s) in enumerate(items[:18])], []))
    first = rounds.train(camp, use_open=False, n_models=3, progress=False)
    second = rounds.train(camp, use_open=False, n_models=3, progress=False)
    assert (first.version, second.version) == ("model-001", "model-002")
    assert rounds.leaf_rows(18) == rounds.MIN_LEAF_ROWS
    camp.close()


def test_a_filter_that_matches_nothing_names_the_values_present(trained):
    camp, _ = trained
    with pytest.raises(InputError, match=r"no result has functional=pbe.*'PBE'"):
        rounds.training_table(camp, use_open=False, progress=False,
                              campaign_filter={"functional": "pbe"})


def test_requiring_a_gap_without_gaps_names_the_rows(trained):
    camp, _ = trained
    missing = int(camp.labels()["gap_soc_eV"].isna().sum())
    assert missing > 0
    with pytest.raises(InputError, match=rf"{missing} labelled rows have no gap_soc_eV") as err:
        rounds.training_table(camp, use_open=False, min_gap_eV=0.02, progress=False)
    assert "rule.csv:" in str(err.value)  # names the results file and line
    gapless = camp.labels().index[camp.labels()["gap_soc_eV"].isna()]
    assert all(f"({cid})" in str(err.value) for cid in gapless)  # every one, not the first few


def test_a_gap_requirement_turns_gapless_high_spillage_negative(tmp_path, capsys):
    """Metals with a high spillage stop counting as hits once a gap is required."""
    from prescreen.cli.main import main
    from prescreen.model import SpillageClassifier

    camp = _new_campaign(tmp_path / "camp")
    items = _structures()
    camp.add_candidates([Candidate(cid, f, f"gen:{i}", s) for i, (cid, f, s) in enumerate(items)])
    rows, expected = [], {}
    for i, (cid, _, s) in enumerate(items):
        spill = _rule(s)
        gap = 0.0 if (spill > 0.5 and i % 3 == 0) else 0.3  # every third heavy one a metal
        rows.append(ResultRow(id=cid, spillage=spill, gap_soc_eV=gap, source=f"r.csv:{i + 2}"))
        expected[cid] = int(spill >= 0.5 and gap >= 0.02)
    camp.ingest_results((rows, []))
    assert camp.labels()["gap_soc_eV"].notna().all()
    plain = rounds.training_table(camp, use_open=False, progress=False)
    gapped = rounds.training_table(camp, use_open=False, min_gap_eV=0.02, progress=False)
    assert list(gapped.y) == [expected[i] for i in gapped.X.index]
    assert 0 < gapped.y.sum() < plain.y.sum()
    assert (gapped.y <= plain.y).all()
    camp.close()

    assert main(["train", str(tmp_path / "camp"), "--min-gap", "-1"]) == 2
    assert "bad --min-gap (got -1.0" in capsys.readouterr().err
    assert main(["train", str(tmp_path / "camp"), "--no-open-data", "--min-gap", "0.02",
                 "--models", "2", "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert f"({int(gapped.y.sum())} positive: spillage >= 0.5 and band gap with SOC >= 0.02 eV)" in out
    with Campaign.open(tmp_path / "camp") as again:
        record = again.latest_model()
        assert record["settings"]["min_gap_eV"] == 0.02
        model = SpillageClassifier.load(again.path / record["path"])
        ranked = rounds.rank(again, progress=False)
    assert model.min_gap_eV_ == 0.02
    assert ranked.attrs["positive_rule"] == "spillage >= 0.5 and band gap with SOC >= 0.02 eV"


def test_cost_descriptors_are_computed_once_per_candidate(trained, monkeypatch):
    from prescreen.acquire import cost

    camp, _ = trained
    first = rounds.rank(camp, progress=False)
    calls = []
    real = cost.descriptors_for_structure
    monkeypatch.setattr(cost, "descriptors_for_structure",
                        lambda s, *a, **k: calls.append(1) or real(s, *a, **k))
    again = rounds.rank(camp, progress=False)
    assert calls == []  # read from the campaign's cache
    pd.testing.assert_series_equal(again["cost_core_hours"], first["cost_core_hours"])
    assert np.isnan(again.loc["f-only", "cost_core_hours"])


def test_labelling_without_gpaw_stops_before_recording_any_failure(trained, monkeypatch):
    import importlib.util

    camp, _ = trained
    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec",
                        lambda name, *a: None if name == "gpaw" else real(name, *a))
    before = (camp.path / "labels" / "records.jsonl").read_text() \
        if (camp.path / "labels" / "records.jsonl").exists() else ""
    with pytest.raises(CampaignError, match="GPAW is not installed.*make dft-env"):
        rounds.label_pending(camp, ids=camp.candidate_ids()[:1], progress=False)
    after = (camp.path / "labels" / "records.jsonl").read_text() \
        if (camp.path / "labels" / "records.jsonl").exists() else ""
    assert after == before
