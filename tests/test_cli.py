"""The command line: exit codes, one-line errors, light start-up."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest
from ase.build import graphene, mx2
from ase.io import write

from prescreen.cli.main import main


@pytest.fixture
def sources(tmp_path):
    folder = tmp_path / "in"
    folder.mkdir()
    write(folder / "mos2.cif", mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=9.0))
    write(folder / "hbn.vasp", graphene("BN", a=2.50, vacuum=9.0), format="vasp")
    (folder / "wish.csv").write_text("id,formula\nw1,Bi2Se3\nw2,Qq2\n")
    return folder


def test_help_imports_no_heavy_library():
    # `prescreen --help` must answer at once: none of the slow scientific stacks may load.
    code = (
        "import sys\nfrom prescreen.cli.main import main\n"
        "try:\n    main(['--help'])\nexcept SystemExit:\n    pass\n"
        "heavy = [m for m in ('lightgbm', 'shap', 'matminer', 'pymatgen', 'sklearn', 'pandas',"
        " 'gpaw', 'ase') if m in sys.modules]\n"
        "print('HEAVY:' + ','.join(heavy))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout
    assert out.strip().splitlines()[-1] == "HEAVY:"


def test_create_status_ingest_round_trip(tmp_path, sources, capsys):
    camp = tmp_path / "camp"
    assert main(["create", str(camp), str(sources), "--no-progress"]) == 0
    out, err = capsys.readouterr()
    assert "added" in out
    assert "Qq2" in err  # the unknown element is reported, with its file
    assert "wish.csv" in err
    results = tmp_path / "r.csv"
    results.write_text("id,spillage\nmos2,0.004\nhbn,0.0\n")
    assert main(["ingest", str(camp), str(results)]) == 0
    capsys.readouterr()
    assert main(["status", str(camp), "--json"]) == 0
    st = json.loads(capsys.readouterr().out)
    assert (st["candidates"], st["monolayers"], st["formula_only"], st["labelled"]) == (3, 2, 1, 2)


def test_user_error_is_one_line_and_exit_2(tmp_path, capsys):
    assert main(["status", str(tmp_path / "nowhere")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and err.count("\n") == 1
    assert "nowhere" in err


def test_traceback_flag_shows_the_trace(tmp_path):
    from prescreen.errors import CampaignError

    with pytest.raises(CampaignError):
        main(["--traceback", "status", str(tmp_path / "nowhere")])


def test_each_command_help_is_its_module_docstring():
    # --help lists one line per command without importing the modules; the line must be
    # the first line of the command module's docstring.
    import importlib

    from prescreen.cli.main import COMMANDS, HELP

    assert set(HELP) == set(COMMANDS)
    for name, module in COMMANDS.items():
        doc = importlib.import_module(f"prescreen.cli.{module}").__doc__
        assert HELP[name] == doc.strip().splitlines()[0]


def test_tables_go_to_the_stdout_of_the_call_not_of_the_import():
    # a notebook or a test capture may replace (and close) sys.stdout after the import
    import contextlib
    import importlib
    import io

    from prescreen.cli import _render

    at_import = io.StringIO()
    with contextlib.redirect_stdout(at_import):
        render = importlib.reload(_render)
    at_import.close()
    now = io.StringIO()
    with contextlib.redirect_stdout(now):
        render.print_table([("added", 3)])
    assert now.getvalue() == "  added  3\n"


def test_z2_refuses_a_layer_without_inversion_and_keeps_earlier_rows(tmp_path, capsys):
    # 2H-MoS2 (point group -6m2) has no inversion centre (International Tables for
    # Crystallography, Vol. A; from memory): the parity method must refuse it, before DFT
    from ase.build import mx2
    from ase.io import write

    src = tmp_path / "in"
    src.mkdir()
    write(src / "mos2-2h.cif", mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=8.0))
    camp = tmp_path / "camp"
    assert main(["create", str(camp), str(src), "--no-progress"]) == 0
    out = camp / "z2.csv"
    out.write_text("id,formula,z2,delta,direct_gap_soc_eV,kmesh,parity_error,wall_s,status,"
                   "reason\nearlier,Bi,1,-1 +1 +1 +1,0.59,6x6x1,1e-15,20,ok,\n")
    capsys.readouterr()
    assert main(["z2", str(camp), "mos2-2h", "mos2-2h", "--method", "parity",
                 "--no-progress"]) == 0
    printed = capsys.readouterr().out
    assert "mos2-2h: no invariant: the structure has no inversion centre" in printed
    assert "no invariant was computed" in printed and "strong evidence" not in printed
    import pandas as pd

    table = pd.read_csv(out, dtype=str, keep_default_na=False).set_index("id")
    assert table.loc["mos2-2h", "status"] == "refused" and table.loc["mos2-2h", "z2"] == ""
    assert table.loc["earlier", "z2"] == "1"  # an earlier run's row is kept
    assert list(table.index).count("mos2-2h") == 1  # an ID given twice is computed once
    # a refusal does not overwrite an earlier result for the same ID
    out.write_text(out.read_text().replace("mos2-2h,MoS2,,,,,,,,refused", "mos2-2h,MoS2,0,+1 +1 +1 +1,0.5,6x6x1,,1e-15,9,ok"))
    assert main(["z2", str(camp), "mos2-2h", "--method", "parity", "--no-progress"]) == 0
    assert "the earlier result is kept" in capsys.readouterr().out
    assert pd.read_csv(out, dtype=str).set_index("id").loc["mos2-2h", "status"] == "ok"
    out.write_text("name,z2\nx,1\n")
    assert main(["z2", str(camp), "mos2-2h"]) == 2
    assert "not a Z2 results file" in capsys.readouterr().err
    assert main(["z2", str(camp), "nope"]) == 2
    assert "unknown candidate ID" in capsys.readouterr().err


def test_sources_that_give_nothing_exit_1_and_rejections_are_not_stored_twice(
        tmp_path, sources, capsys):
    camp = tmp_path / "camp"
    assert main(["create", str(camp), str(tmp_path / "no_such_folder"), "--no-progress"]) == 1
    assert "no_such_folder" in capsys.readouterr().err
    (sources / "notes.txt").write_text("not a structure\n")
    for _ in range(2):  # running `add` again neither fails nor stores the rejection again
        assert main(["add", str(camp), str(sources), "--no-progress"]) == 0
    capsys.readouterr()
    assert main(["status", str(camp), "--json"]) == 0
    st = json.loads(capsys.readouterr().out)
    # the missing folder, the unreadable notes and the unknown element Qq2, once each
    assert st["rejections"] == 3


def test_a_file_that_is_not_a_campaign_store_is_a_one_line_error(tmp_path, capsys):
    (tmp_path / "broken").mkdir()
    (tmp_path / "broken" / "campaign.sqlite").write_text("garbage")
    assert main(["status", str(tmp_path / "broken")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "not a readable campaign store" in err


def test_ingest_repeats_option_and_a_file_without_rows(tmp_path, sources, capsys):
    camp = tmp_path / "camp"
    assert main(["create", str(camp), str(sources), "--no-progress"]) == 0
    twice = tmp_path / "twice.csv"
    twice.write_text("id,spillage\nmos2,0.1\nmos2,0.2\n")
    assert main(["ingest", str(camp), str(twice)]) == 1  # both rows refused: nothing landed
    assert "--repeats first or --repeats last" in capsys.readouterr().err
    assert main(["ingest", str(camp), str(twice), "--repeats", "last"]) == 0
    capsys.readouterr()
    assert main(["status", str(camp), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["labelled"] == 1
    empty = tmp_path / "empty.csv"
    empty.write_text("id,spillage\n")
    assert main(["ingest", str(camp), str(empty)]) == 1
    assert "holds no result rows" in capsys.readouterr().err


def test_status_flagged_names_each_odd_candidate(tmp_path, sources, capsys):
    from ase.build import bulk

    write(sources / "nacl.cif", bulk("NaCl", "rocksalt", a=5.64))  # a bulk crystal slipped in
    camp = tmp_path / "camp"
    assert main(["create", str(camp), str(sources), "--no-progress"]) == 0
    capsys.readouterr()
    assert main(["status", str(camp), "--flagged"]) == 0
    out = capsys.readouterr().out
    listed = [line.split()[0] for line in out.splitlines() if line.startswith("  ")
              and ": " in line and line.split()[0] in ("nacl", "w1", "mos2", "hbn")]
    assert sorted(listed) == ["nacl", "w1"]  # bulk, formula only; the monolayers are not listed
    assert "not 2d" in out and "formula only" in out


@pytest.mark.parametrize("value", ["inf", "nan", "0"])
def test_a_threshold_that_nothing_can_reach_is_refused(tmp_path, capsys, value):
    assert main(["create", str(tmp_path / "c"), "--threshold", value]) == 2
    assert "spillage threshold must be a positive number" in capsys.readouterr().err


def test_label_with_z2_and_nothing_pending_points_to_z2(tmp_path, sources, capsys):
    camp = tmp_path / "camp"
    assert main(["create", str(camp), str(sources), "--no-progress"]) == 0
    capsys.readouterr()
    assert main(["label", str(camp), "--z2"]) == 2
    assert f"run `prescreen z2 {camp}`" in capsys.readouterr().err


def test_label_refuses_a_level_of_theory_other_than_the_campaigns(tmp_path, sources, capsys):
    from prescreen.physics.dft import LabelSettings

    camp = tmp_path / "camp"
    assert main(["create", str(camp), str(sources), "--no-progress"]) == 0
    capsys.readouterr()
    (camp / "labels").mkdir()
    (camp / "labels" / "settings.json").write_text(
        json.dumps(LabelSettings(basis="szp(dzp)").as_dict()))  # as an earlier run left it
    assert main(["label", str(camp), "--basis", "dzp"]) == 2
    err = capsys.readouterr().err
    assert "labels/settings.json: asked for basis='dzp', but" in err and "basis='szp(dzp)'" in err
    assert main(["status", str(camp)]) == 0
    out = capsys.readouterr().out
    assert ("built-in labeller: " + LabelSettings(basis="szp(dzp)").describe()
            + " (fixed by the campaign's first run of prescreen label)") in out
    # a damaged settings file is reported by status, which still lists what was asked
    (camp / "labels" / "settings.json").write_text("{not json")
    assert main(["status", str(camp), "--rejections"]) == 0
    out = capsys.readouterr().out
    assert "built-in labeller: unknown: " in out and "not valid JSON" in out
    assert "Qq2" in out  # the rejections still follow
