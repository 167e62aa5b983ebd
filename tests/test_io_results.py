"""Tests for reading DFT results (prescreen.io.results).

The fixture values are made-up inputs to exercise validation; no test compares them to a
physical reference.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from prescreen.errors import InputError
from prescreen.io.results import ResultRow, read_results, unknown_ids

DATA = Path(__file__).parent / "data"


def _by_line(rejections):
    return {r.line: r for r in rejections}


def test_csv_valid_rows_land_with_metadata():
    rows, _ = read_results(DATA / "io_results.csv")
    assert [r.id for r in rows] == ["MoS2", "WTe2", "dup-same", "Bi2Se3"]
    mos2 = rows[0]
    assert mos2 == ResultRow("MoS2", 0.12, "PBE", "GPAW", "12x12x1", 3.5, "converged",
                             f"{DATA / 'io_results.csv'}:2")
    assert rows[1].kmesh == "12x12x1"  # "12, 12, 1" normalised
    assert rows[3].notes == "multi\nline note" and rows[3].source.endswith(":13")


@pytest.mark.parametrize(
    ("line", "value", "reason"),
    [
        (1, "queue", "column is not used"),
        (4, "nan", "spillage is not finite"),
        (5, "-0.2", "spillage is negative"),
        (6, "", "spillage is missing"),
        (7, "high", "spillage is not a number"),
        (8, "12x12", "kmesh is not three positive integers"),
        (9, "0.4", "id 'dup-diff' appears 2 times with different values (9: 0.4; 10: 0.6)"),
        (10, "0.6", "id 'dup-diff' appears 2 times with different values"),
    ],
)
def test_csv_rejections_name_line_value_reason(line, value, reason):
    _, rejections = read_results(DATA / "io_results.csv")
    assert len(rejections) == 8
    rejection = _by_line(rejections)[line]
    assert rejection.path == str(DATA / "io_results.csv")
    assert rejection.value == value
    assert rejection.reason.startswith(reason), rejection.reason


@pytest.mark.parametrize(("policy", "kept"), [("first", 0.4), ("last", 0.6)])
def test_conflict_policy_keeps_one_row(policy, kept):
    rows, rejections = read_results(DATA / "io_results.csv", on_conflict=policy)
    assert [r.spillage for r in rows if r.id == "dup-diff"] == [kept]
    dup = [r for r in rejections if "dup-diff" in r.reason]
    assert len(dup) == 1 and f"kept the {policy} one" in dup[0].reason


def test_unknown_policy_is_an_error():
    with pytest.raises(InputError, match="unknown conflict policy"):
        read_results(DATA / "io_results.csv", on_conflict="mean")


def test_reading_twice_gives_the_same_result():
    assert read_results(DATA / "io_results.csv") == read_results(DATA / "io_results.csv")


def test_json_rows_and_rejections():
    rows, rejections = read_results(DATA / "io_results.json")
    assert [(r.id, r.spillage, r.kmesh) for r in rows] == [("MoS2", 0.12, "12x12x1"), ("WTe2", 0.83, None)]
    got = _by_line(rejections)
    assert got["[2]"].reason.startswith("spillage is not finite")
    assert got["[3]"].reason.startswith("spillage is not a number") and got["[3]"].value == "True"
    assert "unsafe characters '/'" in got["[4]"].reason
    assert got["[5]"].reason == "entry is not a JSON object"


def test_non_utf8_line_is_rejected_and_others_land():
    rows, rejections = read_results(DATA / "io_results_latin1.csv")
    assert [r.id for r in rows] == ["A1", "A3"]
    (rejection,) = rejections
    assert rejection.line == 3
    assert rejection.reason.startswith("bytes that are not UTF-8 at byte offset 24 (byte 0xff); the line was skipped")


def test_undecodable_file_names_byte_offset():
    with pytest.raises(InputError, match=r"io_results_utf16.csv:1: bytes that are not UTF-8 at byte offset 0 \(byte 0xff\)"):
        read_results(DATA / "io_results_utf16.csv")


def test_non_utf8_json_names_byte_offset(tmp_path):
    path = tmp_path / "r.json"
    path.write_bytes(b'[{"id": "A", "spillage": 0.1, "notes": "caf\xe9"}]')
    with pytest.raises(InputError, match=r"r.json:1: bytes that are not UTF-8 at byte offset 43 \(byte 0xe9\)"):
        read_results(path)


@pytest.mark.parametrize(
    ("content", "message"),
    [
        ("name,spillage\nA,0.1\n", r"no 'id' column"),
        ("id,value\nA,0.1\n", r"no 'spillage' column"),
        ("id,spillage,ID\nA,0.1,B\n", r"column 'id' appears twice"),
    ],
)
def test_missing_or_repeated_columns(tmp_path, content, message):
    path = tmp_path / "r.csv"
    path.write_text(content)
    with pytest.raises(InputError, match=message):
        read_results(path)


def test_invalid_json_is_an_error(tmp_path):
    path = tmp_path / "r.json"
    path.write_text('[{"id": "A", "spillage": 0.1,}]')
    with pytest.raises(InputError, match=r"r.json:1: invalid JSON"):
        read_results(path)


def test_row_with_extra_fields_is_rejected(tmp_path):
    path = tmp_path / "r.csv"
    path.write_text("id,spillage\nA,0.1\nB,0.2,extra\nC,0.3\n")
    rows, rejections = read_results(path)
    assert [r.id for r in rows] == ["A", "C"]
    assert rejections[0].line == 3 and "row has 3 fields but the header has 2" in rejections[0].reason


def test_unknown_ids_helper():
    rows, _ = read_results(DATA / "io_results.json")
    (rejection,) = unknown_ids(rows, ["MoS2"])
    assert rejection.path == str(DATA / "io_results.json") and rejection.line == "[1]"
    assert rejection.value == "WTe2" and "not a candidate of this campaign" in rejection.reason
    assert unknown_ids(rows, {"MoS2", "WTe2"}) == []


def test_json_top_level_must_be_list(tmp_path):
    path = tmp_path / "r.json"
    path.write_text(json.dumps({"id": "A", "spillage": 0.1}))
    with pytest.raises(InputError, match="JSON document is not a list of results"):
        read_results(path)


def test_gap_column_is_read_and_checked(tmp_path):
    path = tmp_path / "gaps.csv"
    path.write_text("id,spillage,gap_soc_eV\nA,0.7,0.0\nB,0.6,0.12\nC,0.1,-1\nD,0.2,\n"
                    "E,0.3,150\n")
    rows, rejections = read_results(path)
    assert [(r.id, r.gap_soc_eV) for r in rows] == [("A", 0.0), ("B", 0.12), ("D", None)]
    bad, in_mev = rejections
    assert bad.line == 4 and bad.value == "-1" and "gap_soc_eV is negative" in bad.reason
    # 150 "eV" is no solid's gap (LiF's, among the widest, is about 14 eV; from memory)
    assert in_mev.line == 6 and in_mev.value == "150" and "meV" in in_mev.reason


def test_direct_gap_column_is_read_and_never_below_the_band_gap(tmp_path):
    # min over k of a direct gap cannot be below the band gap, its minimum over pairs of
    # k points (definition, common practice)
    path = tmp_path / "gaps.csv"
    path.write_text("id,spillage,gap_soc_eV,Direct_Gap_SOC_eV\nA,0.7,0.0,0.05\n"
                    "B,0.6,0.12,0.1\nC,0.1,0.3,0.3004\nD,0.2,,0.4\nE,0.3,0.1,-0.2\n")
    rows, rejections = read_results(path)
    assert [(r.id, r.gap_soc_eV, r.direct_gap_soc_eV) for r in rows] == [
        ("A", 0.0, 0.05), ("C", 0.3, 0.3004), ("D", None, 0.4)]
    below, negative = rejections
    assert below.line == 3 and below.value == "0.1 < 0.12"
    assert "direct_gap_soc_eV below gap_soc_eV" in below.reason
    assert negative.line == 6 and "direct_gap_soc_eV is negative" in negative.reason


@pytest.mark.parametrize(("content", "message", "value"), [
    ("id,spill\n", "no 'spillage' column", "id,spill"),  # refused even without rows
    ("id\tspillage\nMoS2\t0.1\n", "no 'id' column; the header is one field", "id\tspillage"),
    ("id;spillage\nMoS2;0,1\n", "separated by commas", "id;spillage"),
])
def test_a_header_without_the_needed_columns_is_shown_as_read(tmp_path, content, message, value):
    path = tmp_path / "r.csv"
    path.write_text(content)
    with pytest.raises(InputError, match=message) as info:
        read_results(path)
    assert info.value.value == value and info.value.line == 1


def test_pandas_index_column_is_not_a_rejection(tmp_path):
    import pandas as pd

    path = tmp_path / "r.csv"
    pd.DataFrame({"id": ["MoS2", "WTe2"], "spillage": [0.1, 0.9]}).to_csv(path)
    rows, rejections = read_results(path)
    assert [r.id for r in rows] == ["MoS2", "WTe2"] and rejections == []


def test_results_from_a_dataframe_follow_the_file_rules():
    import pandas as pd

    from prescreen.io.results import results_from_frame

    frame = pd.DataFrame({"Spillage": [0.7, -1.0, 0.2], "gap_soc_eV": [0.1, None, None],
                          "queue": ["a", "b", "c"]},
                         index=pd.Index(["MoS2", "WTe2", "hBN"], name="id"))
    rows, rejections = results_from_frame(frame, name="my_table")
    assert [(r.id, r.spillage, r.gap_soc_eV, r.source) for r in rows] == [
        ("MoS2", 0.7, 0.1, "my_table:0"), ("hBN", 0.2, None, "my_table:2")]
    reasons = {r.value: r.reason for r in rejections}
    assert "spillage is negative" in reasons["-1.0"] and "not used" in reasons["queue"]
    with pytest.raises(InputError, match="no 'spillage' column"):
        results_from_frame(pd.DataFrame({"id": ["a"], "value": [1.0]}))


def test_ingesting_a_bare_dataframe_says_what_to_pass(tmp_path):
    import pandas as pd

    from prescreen.campaign import Campaign

    with Campaign.create(tmp_path / "c") as camp:
        with pytest.raises(InputError, match="results_from_frame"):
            camp.ingest_results(pd.DataFrame({"id": ["a"], "spillage": [0.1]}))
