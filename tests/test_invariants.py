"""Campaign-level Z2 bookkeeping (prescreen.invariants), without DFT.

Reference facts: the 2H (trigonal-prismatic, point group -6m2) MX2 layer has no
inversion centre (International Tables for Crystallography, Vol. A; from memory), so
the parity method must refuse it before any calculation, and ``auto`` must send it to
Wilson loops. Spillage and gap values below
are made-up inputs that exercise the selection rule, not physical references.
"""

from __future__ import annotations

from dataclasses import replace

import pytest
from ase.build import mx2
from pymatgen.io.ase import AseAtomsAdaptor

from prescreen.campaign import Campaign
from prescreen.candidate import Candidate
from prescreen.errors import InputError
from prescreen.invariants import INVARIANTS_FILE, compute_invariants, gapped_hits, read_invariants
from prescreen.io.results import ResultRow


@pytest.fixture
def campaign(tmp_path):
    camp = Campaign.create(tmp_path / "c", name="inv")
    two_h = AseAtomsAdaptor.get_structure(mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=8.0))
    camp.add_candidates([Candidate(f"c{i}", "MoS2", f"gen:{i}", two_h.copy()) for i in range(4)]
                        + [Candidate("f-only", "Bi2Se3", "wish.csv:2")])
    base = ResultRow(id="c0", spillage=0.9, source="r.csv:2")
    camp.ingest_results(([replace(base, id="c0", gap_soc_eV=0.3),     # gapped hit
                          replace(base, id="c1", gap_soc_eV=0.0),     # metallic hit
                          replace(base, id="c2", spillage=0.1, gap_soc_eV=1.0),  # no hit
                          replace(base, id="c3")], []))               # hit, gap unknown
    yield camp
    camp.close()


def test_without_a_direct_gap_only_hits_with_a_recorded_band_gap_are_selected(campaign):
    assert gapped_hits(campaign) == ["c0"]
    assert gapped_hits(campaign, ["c1", "c2"]) == []


def test_a_semimetal_hit_with_a_direct_gap_is_selected_and_touching_bands_are_not(campaign):
    # A Z2 invariant needs the occupied bands apart from the empty ones at every k, not an
    # indirect gap: band-inverted semimetals (e.g. 1T'-WTe2 in PBE; Qian et al., Science
    # 346, 1344 (2014), from memory) have one.
    structure = campaign.structure("c0")
    campaign.add_candidates([Candidate(f"s{i}", "MoS2", f"gen:s{i}", structure.copy())
                             for i in range(3)])
    base = ResultRow(id="s0", spillage=0.9, gap_soc_eV=0.0, source="r.csv:2")
    campaign.ingest_results(([replace(base, id="s0", direct_gap_soc_eV=0.05),
                              replace(base, id="s1", direct_gap_soc_eV=0.0),
                              replace(base, id="s2", spillage=0.2, direct_gap_soc_eV=0.3)], []))
    assert gapped_hits(campaign) == ["c0", "s0"]
    # either gap open is enough: a band gap just above the cut with a direct gap rounded
    # just below it still counts
    campaign.add_candidates([Candidate("s3", "MoS2", "gen:s3", structure.copy())])
    campaign.ingest_results(([replace(base, id="s3", gap_soc_eV=0.0205,
                                      direct_gap_soc_eV=0.0198)], []))
    assert gapped_hits(campaign) == ["c0", "s0", "s3"]


def test_refusals_are_recorded_with_the_reason_and_unknown_ids_raise(campaign):
    pytest.importorskip("gpaw")
    outcomes = compute_invariants(campaign, ["c0", "f-only", "c0"], method="parity",
                                  progress=False)
    assert [o.id for o in outcomes] == ["c0", "f-only"]  # each once
    rows = read_invariants(campaign.path / INVARIANTS_FILE)
    assert rows["c0"]["status"] == "refused" and "no inversion centre" in rows["c0"]["reason"]
    assert rows["c0"]["method"] == "parity"
    assert "no structure" in rows["f-only"]["reason"]
    assert "no invariant" in outcomes[0].describe()
    with pytest.raises(InputError, match="unknown candidate ID"):
        compute_invariants(campaign, ["nope"], progress=False)
    with pytest.raises(InputError, match="unknown Z2 method"):
        compute_invariants(campaign, ["c0"], method="guess", progress=False)


def test_auto_sends_a_layer_without_inversion_to_wilson_loops(campaign, monkeypatch):
    # the Wilson-loop DFT is tested in tests/test_wilson.py; here its stand-in records
    # what it was asked, and the row must say which method gave the answer
    pytest.importorskip("gpaw")
    from prescreen.physics import wilson

    asked = []

    def stand_in(structure, settings, *, id=None, **kwargs):
        asked.append(id)
        return wilson.WilsonZ2(id=id, formula="MoS2", z2=0, k2=(0.0, 0.25, 0.5),
                               wcc=((0.1, 0.2),) * 3, gap_centres=(0.6,) * 3,
                               direct_gap_soc_eV=1.6, min_link=0.9, n_occupied=2, nk1=24,
                               kmesh=(6, 6, 1))

    monkeypatch.setattr(wilson, "z2_from_wilson_loops", stand_in)
    (outcome,) = compute_invariants(campaign, ["c0"], progress=False)
    assert asked == ["c0"]
    row = read_invariants(campaign.path / INVARIANTS_FILE)["c0"]
    assert (row["method"], row["z2"], row["wilson_loops"], row["status"]) == (
        "wilson", "0", "3x24", "ok")
    assert row["delta"] == "" and "Wilson loops, 3 lines of 24 k points" in outcome.describe()


def test_files_from_before_the_method_column_still_read(tmp_path):
    path = tmp_path / INVARIANTS_FILE
    path.write_text("id,formula,z2,delta,direct_gap_soc_eV,kmesh,inversion_centre,"
                    "parity_error,wall_s,status,reason\nx,Bi2,1,-1 +1 +1 +1,0.5,6x6x1,,,,ok,\n")
    row = read_invariants(path)["x"]
    assert row["method"] == "" and row["z2"] == "1"


def test_a_file_without_an_id_column_is_refused(tmp_path):
    path = tmp_path / INVARIANTS_FILE
    path.write_text("name,z2\nx,1\n")
    with pytest.raises(InputError, match="not a Z2 results file"):
        read_invariants(path)
    assert read_invariants(tmp_path / "missing.csv") == {}


def test_label_with_z2_checks_the_new_gapped_hits(campaign, monkeypatch, capsys):
    # the labelling and the Wilson loops are replaced (their DFT is tested elsewhere);
    # what is checked is that --z2 picks the gapped hits among the labelled IDs and
    # records the outcome
    pytest.importorskip("gpaw")
    from prescreen.acquire import rounds
    from prescreen.cli.main import main
    from prescreen.errors import LabellingError
    from prescreen.physics import wilson

    def refuse(structure, settings, *, id=None, **kwargs):
        raise LabellingError(f"{id}: no direct gap with spin-orbit coupling (stand-in)")

    monkeypatch.setattr(wilson, "z2_from_wilson_loops", refuse)

    def fake_label_pending(camp, *, ids=None, **kwargs):
        return rounds.LabelOutcome(n_jobs=len(ids), n_ok=len(ids), n_failed=0, n_ingested=0,
                                   failures=(), core_hours=0.0, out_dir=camp.path / "labels")

    monkeypatch.setattr(rounds, "label_pending", fake_label_pending)
    path = campaign.path
    campaign.close()
    assert main(["label", str(path), "c0", "c1", "c2", "--z2", "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "Z2 of 1 hit(s) whose bands with SOC are apart at every k" in out  # c1: a metal
    assert ("hits (spillage >= 0.5): 2 of 3; 1 with a band gap with SOC, 0 semimetals with a "
            "direct gap at every k (Z2 defined for both), 1 metals") in out
    assert "c0: no invariant: c0: no direct gap with spin-orbit coupling (stand-in)" in out
    assert list(read_invariants(path / INVARIANTS_FILE)) == ["c0"]


def _refusing(monkeypatch, module, name, error):
    """Replace ``module.name`` (a Z2 route) by a stand-in that raises ``error(id)``; returns
    the IDs it was asked for, in order."""
    asked = []

    def refuse(structure, settings, *, id=None, **kwargs):
        asked.append(id)
        raise error(id)

    monkeypatch.setattr(module, name, refuse)
    return asked


def test_z2_without_ids_does_not_repeat_a_refusal_for_touching_bands(campaign, monkeypatch,
                                                                     capsys):
    # a semimetal hit with an inversion centre whose bands touch on the parity mesh:
    # refused once, and `prescreen z2` with no IDs does not run it again
    pytest.importorskip("gpaw")
    from pymatgen.io.ase import AseAtomsAdaptor

    from prescreen.cli.main import main
    from prescreen.errors import NoDirectGap
    from prescreen.physics import parity

    asked = _refusing(monkeypatch, parity, "z2_from_parities", lambda id: NoDirectGap(
        f"{id}: no direct gap with spin-orbit coupling (stand-in)", 0.004))
    one_t = AseAtomsAdaptor.get_structure(mx2("MoS2", "1T", a=3.18, thickness=3.13, vacuum=8.0))
    campaign.add_candidates([Candidate("s0", "MoS2", "gen:s0", one_t)])
    campaign.ingest_results(([ResultRow(id="s0", spillage=0.9, gap_soc_eV=0.0,
                                        direct_gap_soc_eV=0.05, source="r.csv:9")], []))
    path = campaign.path
    campaign.close()
    for _ in range(2):
        assert main(["z2", str(path), "s0", "--no-progress"] if not asked
                    else ["z2", str(path), "--no-progress"]) == 0
    assert asked == ["s0"]
    assert read_invariants(path / INVARIANTS_FILE)["s0"]["status"] == "refused"


def test_z2_without_ids_retries_refusals_of_the_parity_method_only(campaign, monkeypatch,
                                                                   capsys):
    # a file from before Wilson loops: c0 (2H, no inversion centre) refused by parities;
    # `prescreen z2` with no IDs must give it Wilson loops once, and not again after that
    pytest.importorskip("gpaw")
    from prescreen.cli.main import main
    from prescreen.errors import LabellingError
    from prescreen.physics import wilson

    asked = _refusing(monkeypatch, wilson, "z2_from_wilson_loops", lambda id: LabellingError(
        f"{id}: no direct gap with spin-orbit coupling (stand-in)"))
    path = campaign.path
    (path / INVARIANTS_FILE).write_text(
        "id,formula,z2,delta,direct_gap_soc_eV,kmesh,inversion_centre,parity_error,wall_s,"
        "status,reason\nc0,MoS2,,,,,,,,refused,the structure has no inversion centre\n")
    campaign.close()
    assert main(["z2", str(path), "--no-progress"]) == 0
    assert asked == ["c0"]
    assert read_invariants(path / INVARIANTS_FILE)["c0"]["method"] == "wilson"
    assert main(["z2", str(path), "--no-progress"]) == 0
    assert asked == ["c0"]  # a Wilson-loop refusal stands
    assert "nothing to compute" in capsys.readouterr().out


def test_z2_without_ids_retries_loops_refused_below_todays_cap_once(campaign, monkeypatch,
                                                                    capsys):
    # a file from a release with a lower cap on points per Wilson loop: c0 refused at half
    # of today's cap is computed again once; refused at the cap, it is not asked again
    pytest.importorskip("gpaw")
    from prescreen.cli.main import main
    from prescreen.errors import LabellingError
    from prescreen.physics import wilson

    asked = _refusing(monkeypatch, wilson, "z2_from_wilson_loops", lambda id: LabellingError(
        wilson.coarse_loops_reason(id, wilson.MAX_NK1, 0.76)))
    path = campaign.path
    (path / INVARIANTS_FILE).write_text(
        "id,formula,z2,delta,direct_gap_soc_eV,kmesh,inversion_centre,parity_error,wall_s,"
        "status,reason,method\nc0,MoS2,,,,,,,,refused,"
        f"\"{wilson.coarse_loops_reason('c0', wilson.MAX_NK1 // 2, 0.76)}\",wilson\n")
    campaign.close()
    assert main(["z2", str(path), "--no-progress"]) == 0
    assert asked == ["c0"]
    assert main(["z2", str(path), "--no-progress"]) == 0
    assert asked == ["c0"]
    assert "nothing to compute" in capsys.readouterr().out
