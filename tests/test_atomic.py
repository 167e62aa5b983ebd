"""prescreen.io.atomic: a failed write leaves the old file, a good one replaces it."""

import json

import pytest

from prescreen.io.atomic import replacing, write_json, write_text


def test_a_write_that_fails_leaves_the_old_file_and_no_temporary(tmp_path):
    target = tmp_path / "records.csv"
    target.write_text("old\n", encoding="utf-8")
    with pytest.raises(RuntimeError), replacing(target) as tmp:
        tmp.write_text("half", encoding="utf-8")
        raise RuntimeError("killed mid-write")
    assert target.read_text(encoding="utf-8") == "old\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["records.csv"]


def test_a_write_that_succeeds_replaces_the_file(tmp_path):
    target = tmp_path / "settings.json"
    write_text(target, "old")
    write_json(target, {"basis": "dzp"}, indent=1)
    assert json.loads(target.read_text(encoding="utf-8")) == {"basis": "dzp"}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["settings.json"]
