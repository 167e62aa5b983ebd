"""The campaign store: idempotent actions, all-or-nothing transactions, feature cache."""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from prescreen.campaign import DB_NAME, Campaign
from prescreen.candidate import Candidate
from prescreen.errors import CampaignError, InputError, Rejection
from prescreen.io.results import ResultRow


def dump(path: Path) -> list[str]:
    """Every row of the store as SQL text, to compare stores exactly."""
    conn = sqlite3.connect(path / DB_NAME)
    try:
        return list(conn.iterdump())
    finally:
        conn.close()


def result(cid: str, spillage: float, line: int = 2, source: str = "r.csv") -> ResultRow:
    return ResultRow(id=cid, spillage=spillage, functional="PBE", code="GPAW", kmesh="12x12x1",
                     core_hours=0.1, notes=None, source=f"{source}:{line}")


@pytest.fixture
def campaign(tmp_path, mos2, hbn, rocksalt):
    camp = Campaign.create(tmp_path / "c", name="test")
    camp.add_candidates([
        Candidate("mos2", "MoS2", "a.cif", mos2),
        Candidate("hbn", "BN", "b.vasp", hbn),
        Candidate("nacl", "NaCl", "c.xyz:1", rocksalt),
        Candidate("bi2se3", "Bi2Se3", "f.csv:2"),
    ])
    yield camp
    camp.close()


def test_open_missing_campaign_names_the_folder(tmp_path):
    with pytest.raises(CampaignError, match=r"not a campaign folder"):
        Campaign.open(tmp_path)


def test_create_twice_is_an_error(tmp_path):
    Campaign.create(tmp_path / "c").close()
    with pytest.raises(CampaignError, match="already exists"):
        Campaign.create(tmp_path / "c")


def test_candidates_flagged_not_dropped(campaign):
    df = campaign.candidates_frame()
    assert list(df.index) == ["mos2", "hbn", "nacl", "bi2se3"]
    assert df.loc["mos2", "layer_status"] == "monolayer"
    assert df.loc["nacl", "layer_status"] == "not_2d"  # bulk rock salt is 3D
    assert df.loc["bi2se3", "layer_status"] == "formula_only"
    # Reduced formula and chemical system follow pymatgen's conventions.
    assert df.loc["mos2", "chemsys"] == "Mo-S"


def test_adding_the_same_candidates_twice_changes_nothing(campaign, mos2):
    before = dump(campaign.path)
    report = campaign.add_candidates([Candidate("mos2", "MoS2", "a.cif", mos2),
                                      Candidate("bi2se3", "Bi2Se3", "f.csv:2")])
    assert report.added == 0 and report.already_present == 2
    assert dump(campaign.path) == before


def test_reused_id_with_other_content_is_rejected(campaign, hbn):
    report = campaign.add_candidates([Candidate("mos2", "BN", "new.cif", hbn)])
    assert report.added == 0
    [rej] = report.rejections
    assert rej.value == "mos2" and "already used" in rej.reason and "a.cif" in rej.reason


def test_duplicate_recorded_with_the_id_it_repeats(campaign, mos2):
    shifted = mos2.copy()
    shifted.translate_sites(range(len(shifted)), [0.3, 0.1, 0.0])
    report = campaign.add_candidates([Candidate("mos2-again", "MoS2", "d.cif", shifted)])
    assert report.duplicates == 1
    assert campaign.candidates_frame().loc["mos2-again", "duplicate_of"] == "mos2"


def test_reader_rejections_are_kept(campaign):
    rej = Rejection("bad.cif", 7, "Xx", "unknown element")
    report = campaign.add_candidates([rej])
    assert report.rejections == [rej]
    assert rej in campaign.rejections()


def test_a_fixed_file_read_again_supersedes_its_old_rejections(campaign, tmp_path):
    from prescreen.io.structures import iter_candidates

    wish, other = tmp_path / "wish.csv", tmp_path / "other.csv"
    wish.write_text("id,formula\nw1,MoS2\nw2,Jk2Se3\nw3,Qq2\n")
    other.write_text("id,formula\no1,Zz3\n")
    campaign.add_candidates(iter_candidates([wish, other]))
    assert campaign.status().rejections == 3
    wish.write_text("id,formula\nw1,MoS2\nw2,Bi2Se3\nw3,Qq2\n")  # w2 fixed, w3 not
    campaign.add_candidates(iter_candidates(wish))
    current = campaign.rejections()
    assert sorted(r.value for r in current) == ["Qq2", "Zz3"]  # other.csv was not read
    assert campaign.status().rejections == 2
    kept = campaign.rejections(include_superseded=True)
    assert sorted(r.value for r in kept) == ["Jk2Se3", "Qq2", "Zz3"]  # nothing deleted
    assert "w2" in campaign.candidate_ids()
    wish.write_text("id,formula\nw1,MoS2\nw2,Bi2Se3\nw3,Jk2Se3\n")  # the old error is back
    campaign.add_candidates(iter_candidates(wish))
    assert sorted(r.value for r in campaign.rejections()) == ["Jk2Se3", "Zz3"]


def test_results_ingest_valid_rows_land_unknown_rejected(campaign):
    rep = campaign.ingest_results(([result("mos2", 0.01), result("ghost", 0.9, line=3)], []))
    assert rep.added == 1
    [rej] = rep.rejections
    assert (rej.path, rej.line, rej.value) == ("r.csv", 3, "ghost")
    assert "unknown candidate ID" in rej.reason
    assert campaign.labels().loc["mos2", "spillage"] == 0.01


def test_ingesting_a_file_twice_changes_nothing(campaign):
    rows = ([result("mos2", 0.01), result("hbn", 0.0, line=3)], [])
    campaign.ingest_results(rows)
    before = dump(campaign.path)
    rep = campaign.ingest_results(rows)
    assert rep.unchanged == 2 and rep.added == 0
    assert dump(campaign.path) == before


@pytest.mark.parametrize(
    ("policy", "expected_value", "n_rejected"),
    [("error", 0.01, 1), ("keep", 0.01, 0), ("replace", 0.7, 0)],
)
def test_conflicting_values_follow_the_policy(campaign, policy, expected_value, n_rejected):
    campaign.ingest_results(([result("mos2", 0.01)], []))
    rep = campaign.ingest_results(([result("mos2", 0.7, source="s.csv")], []),
                                  on_conflict=policy)
    assert len(rep.rejections) == n_rejected
    if n_rejected:
        assert "conflicts with the stored spillage 0.01" in rep.rejections[0].reason
    assert campaign.labels().loc["mos2", "spillage"] == expected_value


def test_a_band_gap_completes_a_result_and_a_missing_one_changes_nothing(campaign):
    from dataclasses import replace

    campaign.ingest_results(([result("mos2", 0.01)], []))  # no gap recorded
    # the same result without a gap: unchanged
    assert campaign.ingest_results(([result("mos2", 0.01)], [])).unchanged == 1
    # the same spillage with a gap: the stored result gains it, in place
    rep = campaign.ingest_results(([replace(result("mos2", 0.01), gap_soc_eV=1.6)], []))
    assert (rep.gaps_added, rep.unchanged, rep.rejections) == (1, 0, [])
    assert campaign.labels().loc["mos2", "gap_soc_eV"] == 1.6
    assert campaign.labels().loc["mos2", "source"] == "r.csv:2"
    # a file without the gap column afterwards: unchanged, the gap stays
    assert campaign.ingest_results(([result("mos2", 0.01)], [])).unchanged == 1
    assert campaign.labels().loc["mos2", "gap_soc_eV"] == 1.6
    # another gap for the same spillage: a conflict, settled by the policy
    rep = campaign.ingest_results(([replace(result("mos2", 0.01), gap_soc_eV=0.2)], []))
    (rej,) = rep.rejections
    assert "conflicts with the stored gap_soc_eV 1.6" in rej.reason
    assert campaign.labels().loc["mos2", "gap_soc_eV"] == 1.6


def test_a_direct_gap_completes_a_result_and_a_different_one_conflicts(campaign):
    from dataclasses import replace

    campaign.ingest_results(([replace(result("mos2", 0.01), gap_soc_eV=1.6)], []))
    rep = campaign.ingest_results(([replace(result("mos2", 0.01), gap_soc_eV=1.6,
                                            direct_gap_soc_eV=1.7)], []))
    assert (rep.gaps_added, rep.unchanged, rep.rejections) == (1, 0, [])
    assert campaign.labels().loc["mos2", ["gap_soc_eV", "direct_gap_soc_eV"]].tolist() == [1.6, 1.7]
    rep = campaign.ingest_results(([replace(result("mos2", 0.01), direct_gap_soc_eV=1.8)], []))
    (rej,) = rep.rejections
    assert "conflicts with the stored direct_gap_soc_eV 1.7" in rej.reason
    assert rej.value == "mos2=0.01 (direct_gap_soc_eV 1.8)"
    assert campaign.labels().loc["mos2", "direct_gap_soc_eV"] == 1.7


def test_a_direct_gap_below_the_stored_band_gap_is_refused(campaign):
    from dataclasses import replace

    campaign.ingest_results(([replace(result("mos2", 0.01), gap_soc_eV=0.3)], []))
    rep = campaign.ingest_results(([replace(result("mos2", 0.01, line=3),
                                            direct_gap_soc_eV=0.01)], []))
    (rej,) = rep.rejections
    assert (rej.line, rep.gaps_added) == (3, 0)
    assert "direct gap would fall below the band gap" in rej.reason
    assert pd.isna(campaign.labels().loc["mos2", "direct_gap_soc_eV"])


def test_unknown_policy_is_an_input_error(campaign):
    with pytest.raises(InputError, match="unknown conflict policy"):
        campaign.ingest_results(([], []), on_conflict="average")


def test_status_counts_positives_at_threshold(campaign):
    campaign.ingest_results(([result("mos2", 0.5), result("hbn", 0.49, line=3)], []))
    st = campaign.status()
    assert (st.candidates, st.monolayers, st.not_2d, st.formula_only) == (4, 2, 1, 1)
    # 0.5 counts as a hit: the threshold is inclusive (spillage >= 0.5, common practice).
    assert (st.labelled, st.positives, st.threshold) == (2, 1, 0.5)


def test_feature_cache_is_keyed_by_schema(campaign):
    calls = []

    def compute(ids, formulas, structures):
        calls.append(list(ids))
        return pd.DataFrame({"n_chars": [len(f) for f in formulas]})

    first = campaign.features(compute, "schema-a")
    again = campaign.features(compute, "schema-a")
    pd.testing.assert_frame_equal(first, again)
    assert len(calls) == 1  # the second call read the cache
    campaign.features(compute, "schema-b")
    assert len(calls) == 2  # another schema is never served from the old cache
    assert first.loc["bi2se3", "n_chars"] == len("Bi2Se3")


def test_rounds_and_pending_proposals(campaign):
    n = campaign.record_round(strategy="greedy", budget_core_hours=10.0, seed=1,
                              model_version=None,
                              proposals=[{"id": "hbn", "probability": 0.2}])
    assert n == 1 and campaign.pending_ids() == ["hbn"]
    campaign.ingest_results(([result("hbn", 0.0)], []))
    assert campaign.pending_ids() == []


_KILLER = textwrap.dedent(
    """
    import sys, time
    from pathlib import Path
    from prescreen.campaign import Campaign
    from prescreen.candidate import Candidate

    ready = Path(sys.argv[2])

    def stall(i):
        if i == 50:
            ready.write_text("in the middle")
            time.sleep(60)

    items = (Candidate(f"f{i}", "Bi2Se3" if i % 2 else "SnTe", f"f.csv:{i}")
             for i in range(100))
    with Campaign.open(sys.argv[1]) as c:
        c.add_candidates(items, _after_each=stall)
    """
)


def test_killed_ingest_leaves_store_exactly_as_before(campaign, tmp_path):
    before = dump(campaign.path)
    ready = tmp_path / "ready"
    proc = subprocess.Popen([sys.executable, "-c", _KILLER, str(campaign.path), str(ready)])
    try:
        deadline = time.monotonic() + 60
        while not ready.exists():
            assert proc.poll() is None, "the ingest process ended before the kill"
            assert time.monotonic() < deadline, "the ingest process never got going"
            time.sleep(0.05)
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait()
    assert proc.returncode == -signal.SIGKILL
    assert dump(campaign.path) == before
    conn = sqlite3.connect(campaign.path / DB_NAME)
    assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    conn.close()


def _store_settings(camp):
    camp.record_model("m1", "models/m1", feature_schema="s", training_rows=1, metrics={},
                      settings={"use_open": False})
    assert camp.latest_model()["settings"] == {"use_open": False}


def _store_gap(camp):
    assert "gap_soc_eV" in camp.labels().columns


def _store_direct_gap(camp):
    camp.ingest_results(([ResultRow(id="mos2", spillage=0.01, gap_soc_eV=1.6,
                                    direct_gap_soc_eV=1.7, source="r.csv:2")], []))
    assert camp.labels().loc["mos2", ["gap_soc_eV", "direct_gap_soc_eV"]].tolist() == [1.6, 1.7]


@pytest.mark.parametrize(("table", "column", "check"), [
    ("models", "settings", _store_settings),  # models before they recorded their settings
    ("results", "gap_soc_eV", _store_gap),  # results before they could carry a gap
    ("results", "direct_gap_soc_eV", _store_direct_gap),  # nor a direct gap
])
def test_store_from_an_earlier_release_is_upgraded_on_open(campaign, table, column, check):
    path = campaign.path
    campaign.close()
    conn = sqlite3.connect(path / DB_NAME)
    conn.executescript(f"ALTER TABLE {table} DROP COLUMN {column};")
    if column == "gap_soc_eV":  # such stores had no direct gap either
        conn.executescript("ALTER TABLE results DROP COLUMN direct_gap_soc_eV;")
    conn.close()
    with Campaign.open(path) as again:
        check(again)


def test_an_ase_atoms_candidate_is_stored_as_a_structure(campaign):
    from ase.build import mx2

    atoms = mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=9.0)
    report = campaign.add_candidates([Candidate("ase-mos2", "MoS2", "notebook", atoms)])
    assert report.added == 1
    stored = campaign.structure("ase-mos2")
    assert stored.composition.reduced_formula == "MoS2"
    np.testing.assert_allclose(stored.lattice.matrix, atoms.cell[:], atol=1e-12)


# --- the labeller's level of theory ----------------------------------------------------
def _fix_settings(camp: Campaign, text: str) -> Path:
    """Write labels/settings.json as a run (or a damaged disk) left it."""
    camp.labels_dir.mkdir(exist_ok=True)
    path = camp.labels_dir / "settings.json"
    path.write_text(text)
    return path


@pytest.mark.parametrize("text, message", [
    ("null", "does not hold a JSON object"),
    ("[]", "does not hold a JSON object"),
    ('{"kpt_density": 5.0, "relax": true}', "damaged: unknown label settings"),
    ('{"kpt_density": 0}', "damaged: LabelSettings.kpt_density out of range"),
    ('{"kpt_density": 5.0', "not valid JSON"),
])
def test_a_damaged_settings_file_is_named_not_read_as_defaults(campaign, text, message):
    path = _fix_settings(campaign, text)
    with pytest.raises(InputError, match=message) as err:
        campaign.label_settings()
    assert str(err.value).startswith(str(path))


def test_a_settings_file_from_before_a_field_existed_gains_its_default(campaign):
    from prescreen.physics.dft import LabelSettings
    from prescreen.physics.labeller import RecordStore

    old = LabelSettings(kpt_density=6.0).as_dict()
    del old["soc_scale"]  # a field added later; its default is the earlier behaviour
    path = _fix_settings(campaign, json.dumps(old))
    assert campaign.label_settings() == LabelSettings(kpt_density=6.0)
    assert json.loads(path.read_text()) == old  # reading does not write
    # the labeller's checkpoint, which a campaign's labelling run opens, completes it
    RecordStore(campaign.labels_dir, campaign.label_settings())
    assert json.loads(path.read_text()) == LabelSettings(kpt_density=6.0).as_dict()


def test_plane_wave_labels_are_asked_for_with_their_mode(campaign):
    from prescreen.physics.dft import LabelSettings

    assert campaign.label_settings(mode="pw", ecut_eV=600.0) == LabelSettings(
        mode="pw", ecut_eV=600.0)
    with pytest.raises(InputError, match="ecut_eV out of range.*mode='pw'"):
        campaign.label_settings(ecut_eV=600.0)  # a cutoff without plane waves


def test_other_settings_are_refused_by_name_including_an_explicit_mesh(campaign):
    from prescreen.physics.dft import LabelSettings

    fixed = LabelSettings(kpts=(12, 12, 1))
    _fix_settings(campaign, json.dumps(fixed.as_dict()))
    with pytest.raises(InputError, match=r"kpt_density=9\.0, but .* computed with kpts=\(12, 12"):
        campaign.label_settings(kpt_density=9.0)  # the density was never used
    assert campaign.check_label_settings(LabelSettings(kpts=(12, 12, 1))) == fixed
    with pytest.raises(InputError, match=r"asked for kpts=None, but .* kpts=\(12, 12, 1\)"):
        campaign.check_label_settings(LabelSettings())
    with pytest.raises(InputError, match=r"smearing_eV=0\.05, but .* smearing_eV=0\.01"):
        campaign.check_label_settings(LabelSettings(kpts=(12, 12, 1), smearing_eV=0.05))
