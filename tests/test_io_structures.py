"""Tests for the candidate readers and identifiers (prescreen.io.structures / ids / formulas).

Fixtures under tests/data/io_good were written with pymatgen (CifWriter, Poscar), ASE
(extxyz, ase.db) and Structure.as_dict from ASE-built 2H-MoS2, graphene, hBN and
rock-salt NaCl; tests/data/io_bad holds hand-made malformed files.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import numpy as np
import pytest
from pymatgen.core import Lattice, Structure
from pymatgen.io.ase import AseAtomsAdaptor

from prescreen.candidate import Candidate
from prescreen.errors import InputError, Rejection
from prescreen.io.ids import content_id, validate_id
from prescreen.io.structures import detect_format, iter_candidates, read_poscar

DATA = Path(__file__).parent / "data"
GOOD = DATA / "io_good"
BAD = DATA / "io_bad"


def _split(items):
    items = list(items)
    return [c for c in items if isinstance(c, Candidate)], [r for r in items if isinstance(r, Rejection)]


def _reference(path: Path, index: int = 0) -> Structure:
    """The same file read by an open reference reader (pymatgen / ASE)."""
    import ase.io

    return AseAtomsAdaptor.get_structure(ase.io.read(path, index=index))


# ---------------------------------------------------------------- identifiers


@pytest.mark.parametrize("raw", ["MoS2", "mp_1.2-x", "a" * 128, " WTe2 "])
def test_validate_id_accepts_safe_names(raw):
    assert validate_id(raw) == raw.strip()


@pytest.mark.parametrize(
    ("raw", "message"),
    [
        ("", "identifier is empty"),
        ("../etc", "unsafe characters '/'"),
        ("a/b", "unsafe characters '/'"),
        ("a\\b", r"unsafe characters '\\\\'"),
        (".hidden", "starts with '.'"),
        ("a..b", r"contains '\.\.'"),
        ("MoS2 mono", "unsafe characters ' '"),
        ("a" * 129, "129 characters long"),
        ("CON", "reserved device name"),
        ("nul.txt", "reserved device name"),
    ],
)
def test_validate_id_rejects_unsafe_names(raw, message):
    with pytest.raises(InputError, match=message) as info:
        validate_id(raw, path="ids.csv", line=4)
    assert str(info.value).startswith("ids.csv:4: ")


def test_content_id_ignores_site_order_images_and_noise():
    lattice = Lattice.hexagonal(3.18, 20.0)
    a = Structure(lattice, ["Mo", "S", "S"], [[0, 0, 0.5], [1 / 3, 2 / 3, 0.58], [1 / 3, 2 / 3, 0.42]])
    b = Structure(lattice, ["S", "Mo", "S"], [[1 / 3, 2 / 3, 0.42 + 1e-7], [1.0, 0, 0.5], [1 / 3 - 1, 2 / 3, 0.58]])
    c = Structure(lattice, ["Mo", "S", "S"], [[0, 0, 0.5], [1 / 3, 2 / 3, 0.60], [1 / 3, 2 / 3, 0.42]])
    assert content_id(a) == content_id(b)
    assert content_id(a) != content_id(c)
    assert content_id(a).startswith("s-") and len(content_id(a)) == 18
    assert validate_id(content_id(a)) == content_id(a)


# ---------------------------------------------------------------- good files


def test_folder_reads_every_format_with_ids_and_structures():
    candidates, rejections = _split(iter_candidates(GOOD))
    assert rejections == []
    by_id = {c.id: c for c in candidates}
    assert set(by_id) == {
        "MoS2", "POSCAR_NaCl", "f-MoS2", "f-WSe2", "f-Bi2Se3", "graphene-frame", "frames-1", "hBN",
        "MoS2-db", "rows-2", "structures-0", "NaCl-json", "two_blocks-graphene", "two_blocks-hBN",
    }
    assert {by_id[k].formula for k in ("MoS2", "MoS2-db")} == {"MoS2"}
    assert by_id["NaCl-json"].formula == by_id["POSCAR_NaCl"].formula == "NaCl"
    # composition-only rows carry no structure and keep their extra columns
    assert by_id["f-MoS2"].structure is None and by_id["f-MoS2"].meta == {"source_note": "paper A"}
    assert all(by_id[k].structure is not None for k in by_id if not k.startswith("f-"))


@pytest.mark.parametrize(
    ("name", "index", "ident"),
    [("MoS2.cif", 0, "MoS2"), ("hBN.vasp", 0, "hBN"), ("POSCAR_NaCl", 0, "POSCAR_NaCl"),
     ("frames.extxyz", 0, "graphene-frame"), ("frames.extxyz", 1, "frames-1")],
)
def test_structures_match_reference_readers(name, index, ident):
    candidates, _ = _split(iter_candidates(GOOD / name))
    got = next(c for c in candidates if c.id == ident).structure
    ref = _reference(GOOD / name, index)  # ASE's own reader is the reference
    np.testing.assert_allclose(got.lattice.matrix, ref.lattice.matrix, atol=1e-6)
    assert [str(s.specie) for s in got] == [str(s.specie) for s in ref]
    np.testing.assert_allclose(got.cart_coords, ref.cart_coords, atol=1e-5)


def test_read_poscar_matches_pymatgen_poscar():
    from pymatgen.io.vasp import Poscar

    text = (GOOD / "hBN.vasp").read_text()
    ours = read_poscar(text)
    ref = Poscar.from_str(text).structure  # pymatgen's reader as reference
    assert ours == ref


def test_read_poscar_negative_scale_is_volume():
    text = (GOOD / "hBN.vasp").read_text().splitlines()
    volume = Structure.from_file(GOOD / "hBN.vasp").volume
    text[1] = f"-{2 * volume}"  # VASP convention: a negative scale is the cell volume (A^3)
    assert read_poscar("\n".join(text)).volume == pytest.approx(2 * volume)


def test_glob_and_list_of_sources(tmp_path):
    shutil.copy(GOOD / "MoS2.cif", tmp_path / "a.cif")
    shutil.copy(GOOD / "hBN.vasp", tmp_path / "b.vasp")
    (tmp_path / ".hidden.cif").write_text("ignored hidden file")
    candidates, rejections = _split(iter_candidates([str(tmp_path / "*.cif"), tmp_path / "b.vasp"]))
    assert [c.id for c in candidates] == ["a", "b"] and rejections == []
    candidates, rejections = _split(iter_candidates(tmp_path))
    assert [c.id for c in candidates] == ["a", "b"] and rejections == []


@pytest.mark.parametrize(
    ("name", "fmt"),
    [("MoS2.cif", "cif"), ("hBN.vasp", "poscar"), ("POSCAR_NaCl", "poscar"), ("frames.extxyz", "extxyz"),
     ("rows.db", "db"), ("structures.json", "json"), ("formulas.csv", "formulas")],
)
def test_detect_format_by_name_and_by_content(tmp_path, name, fmt):
    assert detect_format(GOOD / name) == fmt
    if fmt != "formulas":  # content sniffing for files without a known suffix
        copy = tmp_path / "noext"
        shutil.copy(GOOD / name, copy)
        assert detect_format(copy) == fmt


# ---------------------------------------------------------------- bad files


@pytest.mark.parametrize(
    ("name", "line", "reason"),
    [
        ("truncated.cif", 2, r"CIF block data_MoS2 cannot be read: ValueError: No structure parsed"),
        ("truncated_atoms.cif", 2, r"CIF block data_MoS2 cannot be read"),
        ("unknown_element.cif", 2, r"^unknown element Xx"),
        ("wrong_counts.vasp", 11, r"expected 3 atom positions \(counts on line 7\) but found 2"),
        ("unknown_element.vasp", 6, r"unknown element 'Qq' on line 6"),
        ("broken.db", None, r"not an SQLite database"),
        ("broken.json", 1, r"invalid JSON: Expecting ',' delimiter"),
        ("notes.txt", None, r"unrecognised file format"),
    ],
)
def test_malformed_structure_files_are_rejections(name, line, reason):
    candidates, rejections = _split(iter_candidates(BAD / name))
    assert candidates == []
    assert len(rejections) == 1
    rejection = rejections[0]
    assert rejection.path == str(BAD / name)
    assert rejection.line == line
    assert re.search(reason, rejection.reason), rejection.reason


def test_poscar_with_more_positions_than_counts():
    text = (BAD / "wrong_counts.vasp").read_text().replace("\n2 1\n", "\n1 0\n")
    with pytest.raises(InputError, match="atom counts must be positive"):
        read_poscar(text, path="x.vasp")
    text = (BAD / "wrong_counts.vasp").read_text().replace("\n2 1\n", "\n1 0 \n").replace("B N\n", "B\n")
    with pytest.raises(InputError, match=r"names 1 elements but line 7 gives 2 counts"):
        read_poscar(text, path="x.vasp")
    text = (GOOD / "hBN.vasp").read_text().replace("\n1 1\n", "\n1\n").replace("B N\n", "B\n")
    with pytest.raises(InputError, match=r"x.vasp:10: more atom positions than the counts on line 7 announce"):
        read_poscar(text, path="x.vasp")


def test_extxyz_bad_frames_do_not_stop_good_ones():
    candidates, rejections = _split(iter_candidates(BAD / "mixed.extxyz"))
    assert [c.id for c in candidates] == ["good-frame", "after-bad"]
    assert [(r.line, r.reason.split(":")[0]) for r in rejections] == [
        (5, "frame 1 cannot be read"),
        (9, "frame 2 has no periodic cell; expected a Lattice=\"...\" with three independent vectors"),
        (18, "frame 4 announces 4 atoms but only 2 atom lines follow"),
    ]
    assert "Qq" in rejections[0].reason


def test_formula_csv_rows_rejected_with_line_and_reason():
    candidates, rejections = _split(iter_candidates(BAD / "formulas.csv"))
    assert [c.id for c in candidates] == ["ok-1"]
    got = {r.line: r for r in rejections}
    assert got[3].reason.startswith("unknown element Xx") and got[3].value == "Xx2Se"
    assert "negative" in got[4].reason
    assert got[5].reason.startswith("formula is empty")
    assert "unsafe characters '/'" in got[6].reason and got[6].value == "../evil"
    assert "already used by" in got[7].reason and str(BAD / "formulas.csv") + ":2" in got[7].reason


def test_non_utf8_line_in_formula_csv_is_rejected_and_rest_read():
    candidates, rejections = _split(iter_candidates(BAD / "formulas_latin1.csv"))
    assert [c.id for c in candidates] == ["u-1", "u-3"]
    (rejection,) = rejections
    assert rejection.line == 3
    assert "not UTF-8 at byte offset 25 (byte 0xe9)" in rejection.reason


def test_duplicate_id_across_sources_names_both(tmp_path):
    shutil.copy(GOOD / "MoS2.cif", tmp_path / "MoS2.cif")
    candidates, rejections = _split(iter_candidates([GOOD / "MoS2.cif", tmp_path / "MoS2.cif"]))
    assert [c.source for c in candidates] == [str(GOOD / "MoS2.cif")]
    (rejection,) = rejections
    assert rejection.path == str(tmp_path / "MoS2.cif")
    assert f"identifier 'MoS2' already used by {GOOD / 'MoS2.cif'}" in rejection.reason


@pytest.mark.parametrize("source", ["no/such/dir", "no_match_*.cif"])
def test_missing_sources_are_rejections(source):
    (rejection,) = list(iter_candidates(source))
    assert rejection.reason in {"no such file or folder", "no file matches this pattern"}


def test_unsafe_file_stem_is_rejected(tmp_path):
    shutil.copy(GOOD / "MoS2.cif", tmp_path / "MoS2 mono.cif")
    (rejection,) = list(iter_candidates(tmp_path))
    assert "unsafe characters ' '" in rejection.reason and rejection.value == "MoS2 mono"


def test_ase_db_does_not_modify_foreign_sqlite(tmp_path):
    import sqlite3

    path = tmp_path / "other.db"
    with sqlite3.connect(path) as con:
        con.execute("CREATE TABLE things (x)")
    before = path.read_bytes()
    (rejection,) = list(iter_candidates(path))
    assert "not an ASE database" in rejection.reason
    assert path.read_bytes() == before


def test_non_utf8_structure_file_names_byte_offset(tmp_path):
    path = tmp_path / "latin.cif"
    text = (GOOD / "MoS2.cif").read_bytes()
    path.write_bytes(text.replace(b"# generated using pymatgen", b"# caf\xe9"))
    (rejection,) = list(iter_candidates(path))
    assert rejection.line == 1
    assert rejection.reason.startswith("bytes that are not UTF-8 at byte offset 5 (byte 0xe9)")


def test_formula_csv_without_formula_column(tmp_path):
    path = tmp_path / "f.csv"
    path.write_text("id,composition\na,MoS2\n")
    (rejection,) = list(iter_candidates(path))
    assert rejection.reason == "no formula column 'formula' in the header"
    candidates, rejections = _split(iter_candidates(path, formula_column="Composition"))
    assert [(c.id, c.formula) for c in candidates] == [("a", "MoS2")] and rejections == []


def test_formula_csv_without_id_column_numbers_rows(tmp_path):
    path = tmp_path / "list.csv"
    path.write_text("formula\nMoS2\nWTe2\n")
    candidates, _ = _split(iter_candidates(path))
    assert [c.id for c in candidates] == ["list-1", "list-2"]


def test_formula_csv_ids_from_a_name_column_and_a_missing_named_column_is_refused(tmp_path):
    path = tmp_path / "named.csv"
    path.write_text("name,formula\nmy-a,MoS2\nmy-b,WSe2\n")
    candidates, rejections = _split(iter_candidates(path))
    assert [c.id for c in candidates] == ["my-a", "my-b"] and rejections == []
    (rejection,) = list(iter_candidates(path, id_column="nmae"))
    assert rejection.reason == "no ID column 'nmae' in the header" and rejection.line == 1
    assert rejection.value == "name, formula"


@pytest.mark.parametrize("formula", ["Mo0S2", "MoS0.0"])
def test_a_zero_amount_in_a_formula_is_refused(tmp_path, formula):
    path = tmp_path / "zero.csv"
    path.write_text(f"id,formula\nz1,{formula}\n")
    (rejection,) = list(iter_candidates(path))
    assert "is zero" in rejection.reason and rejection.value == formula and rejection.line == 2


def test_plain_poscar_files_take_their_folder_name(tmp_path):
    for name in ("MoS2-1H", "hBN-x"):
        (tmp_path / name).mkdir()
        shutil.copy(GOOD / "hBN.vasp", tmp_path / name / ("POSCAR" if name == "MoS2-1H" else "CONTCAR"))
    candidates, rejections = _split(iter_candidates(tmp_path))
    assert [c.id for c in candidates] == ["MoS2-1H", "hBN-x"] and rejections == []


@pytest.mark.parametrize("variant", ["selective", "cartesian-scaled", "vasp6-species"])
def test_read_poscar_variants_match_pymatgen(variant):
    from pymatgen.io.vasp import Poscar

    structure = Structure.from_file(GOOD / "POSCAR_NaCl")
    if variant == "selective":
        text = Poscar(structure, selective_dynamics=[[True, True, False]] * len(structure)).get_str()
    elif variant == "cartesian-scaled":
        lines = Poscar(structure).get_str(direct=False).splitlines()
        lines[1] = "2.0"  # VASP multiplies lattice and Cartesian positions by the scale
        lines[2:5] = ["  ".join(f"{x / 2:.10f}" for x in row) for row in structure.lattice.matrix]
        lines[8:] = ["  ".join(f"{x / 2:.10f}" for x in site.coords) for site in structure]
        text = "\n".join(lines) + "\n"
    else:
        text = Poscar(structure).get_str().replace("\nNa Cl\n", "\nNa_pv/1a2b3c Cl/4d5e6f\n")
    ours = read_poscar(text)
    assert ours.composition == structure.composition
    np.testing.assert_allclose(ours.lattice.matrix, structure.lattice.matrix, atol=1e-8)
    np.testing.assert_allclose(ours.cart_coords, structure.cart_coords, atol=1e-8)
    if variant != "vasp6-species":
        ref = Poscar.from_str(text).structure  # pymatgen's reader as reference
        assert [str(sp) for sp in ours.species] == [str(sp) for sp in ref.species]
        np.testing.assert_allclose(ours.lattice.matrix, ref.lattice.matrix, atol=1e-8)
        np.testing.assert_allclose(ours.frac_coords, ref.frac_coords, atol=1e-8)


def test_cif_cut_short_inside_the_atom_sites_is_refused_not_read_as_another_material(tmp_path):
    # pymatgen's CifParser.check compares the parsed sites with _chemical_formula_sum; a
    # MoS2 block cut after its Mo row must not land as a one-atom "Mo" layer.
    lines = (GOOD / "MoS2.cif").read_text().splitlines(keepends=True)
    last_mo = max(k for k, line in enumerate(lines) if line.split()[:1] == ["Mo"])
    cut = tmp_path / "cut.cif"
    cut.write_text("".join(lines[: last_mo + 1]))
    candidates, (rejection,) = _split(iter_candidates(cut))
    assert candidates == []
    assert "disagree with the block's _chemical_formula_sum" in rejection.reason
    assert "Missing elements S" in rejection.reason and rejection.line == 2


def test_files_without_entries_are_reported(tmp_path):
    (tmp_path / "empty.extxyz").write_text("\n\n")
    (tmp_path / "list.json").write_text("[]")
    (tmp_path / "header.csv").write_text("id,formula\n")
    import ase.db

    ase.db.connect(str(tmp_path / "none.db")).count()  # an ASE database with no rows
    candidates, rejections = _split(iter_candidates(tmp_path))
    assert candidates == []
    reported = {Path(r.path).name: r.reason for r in rejections}
    assert set(reported) >= {"empty.extxyz", "list.json", "header.csv"}
    assert all("holds no entries" in reason or "no 'systems' table" in reason
               for reason in reported.values())


def test_overlapping_atoms_are_refused_with_the_pair(tmp_path):
    from ase import Atoms
    from ase.io import write

    atoms = Atoms("BN", positions=[[0, 0, 9], [0, 0, 9.1]], cell=[2.5, 2.5, 18], pbc=True)
    write(tmp_path / "overlap.extxyz", atoms, format="extxyz")
    candidates, (rejection,) = _split(iter_candidates(tmp_path / "overlap.extxyz"))
    assert candidates == []
    assert "atoms 1 (B) and 2 (N) overlap" in rejection.reason
    assert rejection.value == "0.100 A apart" and rejection.line == 1


def test_an_unexpected_entry_shape_is_a_rejection_and_later_files_are_read(tmp_path):
    entry = Structure(Lattice.hexagonal(2.5, 18), ["B", "N"],
                      [[1 / 3, 2 / 3, 0.5], [2 / 3, 1 / 3, 0.5]]).as_dict()
    entry["properties"] = ["not", "a", "dict"]
    import json

    (tmp_path / "a.json").write_text(json.dumps([entry]))
    shutil.copy(GOOD / "MoS2.cif", tmp_path / "b.cif")
    candidates, rejections = _split(iter_candidates(tmp_path))
    assert [c.id for c in candidates] == ["a-0", "b"]
    assert rejections == []


def test_duplicate_extxyz_frames_are_located_by_line(tmp_path):
    from ase.io import write

    from ase import Atoms

    frame = Atoms("BN", scaled_positions=[[1 / 3, 2 / 3, 0.5], [2 / 3, 1 / 3, 0.5]],
                  cell=[[2.5, 0, 0], [-1.25, 2.165, 0], [0, 0, 18]], pbc=True)
    frame.info["name"] = "xx"
    write(tmp_path / "dup.extxyz", [frame, frame], format="extxyz")
    candidates, (rejection,) = _split(iter_candidates(tmp_path / "dup.extxyz"))
    assert [c.source for c in candidates] == [f"{tmp_path / 'dup.extxyz'}:1"]
    assert rejection.line == 5  # the second frame starts on line 5 (2 atoms + 2 header lines)
    assert f"already used by {tmp_path / 'dup.extxyz'}:1" in rejection.reason
