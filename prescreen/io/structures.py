"""Streaming readers for candidate structures and formula lists.

:func:`iter_candidates` walks files, folders (recursively) and glob patterns and yields
one :class:`~prescreen.candidate.Candidate` per structure (or formula row) and one
:class:`~prescreen.errors.Rejection` per entry that cannot be used. It never raises
for bad input and never drops an entry silently: the valid entries keep coming.

Formats (chosen by extension, else by looking at the first bytes):

========================  ==========================================  ===================================
format                    recognised by                               identifier
========================  ==========================================  ===================================
CIF (several blocks ok)   ``.cif``, a ``data_`` line                  file stem; ``stem-block`` if several
POSCAR / CONTCAR (VASP 5) name ``POSCAR*``/``CONTCAR*``, ``.vasp``,   file stem; folder name if the
                          ``.poscar``                                 file is just POSCAR or CONTCAR
extended XYZ (frames)     ``.xyz``, ``.extxyz``                       ``id``/``name`` info key, else
                                                                      ``stem-<frame>`` (0-based)
ASE SQLite database       ``.db``, SQLite header                      ``id``/``name`` key-value pair, else
                                                                      ``stem-<row id>``
pymatgen JSON             ``.json`` (a Structure dict or a list;      ``id``/``name`` (entry or its
                          an entry may be ``{"id":..,                 ``properties``), else the stem
                          "structure": {..}}``)                       (single) or ``stem-<index>``
formula CSV               ``.csv``                                    id column, else ``stem-<row>``
========================  ==========================================  ===================================

Hidden files and folders (name starting with ``.``) inside a folder are skipped; every
other file that is not one of these formats gives a Rejection. Structures are checked
to hold real chemical elements, full site occupancies and a cell of non-zero volume;
every structure is periodic along its three lattice vectors (an extended XYZ or ASE
row with ``pbc`` false along the stacking direction keeps its cell, vacuum included).
"""

from __future__ import annotations

import glob
import io
import json
import math
import sqlite3
import warnings
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any

import numpy as np

from prescreen.candidate import Candidate
from prescreen.errors import InputError, Rejection
from prescreen.io.formulas import iter_formula_csv, read_utf8_text
from prescreen.io.ids import validate_id

__all__ = ["FORMAT_BY_SUFFIX", "detect_format", "iter_candidates", "read_poscar"]

#: File-name suffix (lower case) to format name.
FORMAT_BY_SUFFIX: dict[str, str] = {
    ".cif": "cif",
    ".vasp": "poscar",
    ".poscar": "poscar",
    ".xyz": "extxyz",
    ".extxyz": "extxyz",
    ".db": "db",
    ".json": "json",
    ".csv": "formulas",
}

#: Smallest accepted cell volume, A^3 (guards against degenerate lattices; common practice).
MIN_CELL_VOLUME_A3: float = 1e-3

#: Closest accepted distance between two atoms, Angstrom. The shortest bond in nature
#: (H2) is 0.74 A; anything closer is a broken file (common practice, chosen here).
MIN_ATOM_DISTANCE_A: float = 0.5

_SQLITE_MAGIC = b"SQLite format 3\x00"
_GLOB_CHARS = set("*?[")


# --------------------------------------------------------------------------- sources


def _expand_sources(sources: str | Path | Iterable[str | Path]) -> Iterator[Path | Rejection]:
    if isinstance(sources, (str, Path)):
        sources = [sources]
    for source in sources:
        path = Path(source)
        if path.is_dir():
            yield from _walk(path)
        elif path.is_file():
            yield path
        elif _GLOB_CHARS & set(str(source)):
            matches = sorted(glob.glob(str(source), recursive=True))
            if not matches:
                yield Rejection(str(source), None, str(source), "no file matches this pattern")
            for match in matches:
                match_path = Path(match)
                yield from (_walk(match_path) if match_path.is_dir() else [match_path])
        else:
            yield Rejection(str(source), None, str(source), "no such file or folder")


def _walk(folder: Path) -> Iterator[Path]:
    """Files under ``folder`` in sorted order, skipping hidden files and folders."""
    children = sorted(folder.iterdir(), key=lambda p: p.name)
    for child in children:
        if child.name.startswith("."):
            continue
        if child.is_dir():
            yield from _walk(child)
        elif child.is_file():
            yield child


def detect_format(path: str | Path) -> str | None:
    """Return the format name of a file, or ``None`` if it is not one that is read.

    Parameters
    ----------
    path
        The file; its suffix decides, then its name (``POSCAR*``, ``CONTCAR*``), then
        its first bytes (SQLite header, JSON, ``data_`` line, XYZ atom count, POSCAR
        lattice lines).
    """
    path = Path(path)
    fmt = FORMAT_BY_SUFFIX.get(path.suffix.lower())
    if fmt is not None:
        return fmt
    upper = path.name.upper()
    if upper.startswith(("POSCAR", "CONTCAR")):
        return "poscar"
    try:
        with path.open("rb") as handle:
            head = handle.read(4096)
    except OSError:
        return None
    if head.startswith(_SQLITE_MAGIC):
        return "db"
    text = head.decode("utf-8", errors="replace")
    stripped = text.lstrip()
    if stripped.startswith(("{", "[")):
        return "json"
    lines = text.splitlines()
    if any(line.lstrip().lower().startswith("data_") for line in lines[:50]):
        return "cif"
    if lines and lines[0].strip().isdigit() and len(lines) > 1 and "lattice=" in lines[1].lower():
        return "extxyz"
    if len(lines) >= 7 and all(_floats(lines[k], 3) is not None for k in (2, 3, 4)) and (
        _floats(lines[1], 1) is not None or _floats(lines[1], 3) is not None
    ):
        return "poscar"
    return None


def _floats(line: str, n: int) -> list[float] | None:
    parts = line.split()
    if len(parts) < n:
        return None
    try:
        return [float(p) for p in parts[:n]]
    except ValueError:
        return None


# --------------------------------------------------------------------------- checks


def _checked(structure: Any, *, path: Path, line: int | str | None) -> Any:
    """Raise InputError unless the structure holds real elements, full occupancy, a cell."""
    from pymatgen.core import DummySpecies, Element, Species

    if len(structure) == 0:
        raise InputError("structure has no atoms", path=path, line=line, expected="at least one site")
    if not structure.is_ordered:
        partial = next(str(site.species) for site in structure if not site.is_ordered)
        raise InputError("structure has partially occupied sites", path=path, line=line, value=partial,
                         expected="an ordered structure (every site fully occupied by one element)")
    unknown = sorted(
        {getattr(sp, "symbol", str(sp)) for sp in structure.composition
         if isinstance(sp, DummySpecies) or not isinstance(sp, (Element, Species))}
    )
    if unknown:
        raise InputError(f"unknown element {', '.join(unknown)}", path=path, line=line,
                         value=", ".join(unknown), expected="chemical element symbols")
    volume = structure.lattice.volume
    if not math.isfinite(volume) or abs(volume) < MIN_CELL_VOLUME_A3:
        raise InputError("cell has no volume", path=path, line=line, value=volume,
                         expected="three independent lattice vectors (a periodic cell)")
    if not np.all(np.isfinite(structure.frac_coords)):
        raise InputError("atom positions are not finite numbers", path=path, line=line,
                         expected="finite coordinates")
    if len(structure) > 1:
        centre, neighbour, _, dist = structure.get_neighbor_list(MIN_ATOM_DISTANCE_A)
        if len(dist):
            k = int(np.argmin(dist))
            i, j = int(centre[k]), int(neighbour[k])
            raise InputError(
                f"atoms {i + 1} ({structure[i].specie}) and {j + 1} ({structure[j].specie}) "
                "overlap", path=path, line=line, value=f"{dist[k]:.3f} A apart",
                expected=f"atoms at least {MIN_ATOM_DISTANCE_A} A apart (a duplicated site?)")
    return structure


def _candidate(ident: str, structure: Any, source: str, *, path: Path, line: int | str | None,
               meta: dict[str, str] | None = None) -> Candidate:
    structure = _checked(structure, path=path, line=line)
    ident = validate_id(ident, path=path, line=line)
    return Candidate(id=ident, formula=structure.composition.reduced_formula, source=source,
                     structure=structure, meta=meta or {})


def _warning_text(caught: list[warnings.WarningMessage]) -> str:
    messages = []
    for item in caught:
        text = str(item.message).strip()
        if text and text not in messages:
            messages.append(text)
    return "; ".join(messages)


# --------------------------------------------------------------------------- CIF


def _iter_cif(path: Path) -> Iterator[Candidate | Rejection]:
    from pymatgen.io.cif import CifParser

    text = read_utf8_text(path)
    lines = text.splitlines(keepends=True)
    starts = [k for k, line in enumerate(lines) if line.lstrip().lower().startswith("data_")]
    if not starts:
        yield Rejection(str(path), None, path.name, "no 'data_' block in this CIF file")
        return
    several = len(starts) > 1
    for number, start in enumerate(starts):
        end = starts[number + 1] if several and number + 1 < len(starts) else len(lines)
        block_text = "".join(lines[start:end])
        block = lines[start].strip()[5:].split()[0] if lines[start].strip()[5:].strip() else str(number)
        line = start + 1
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                try:
                    parser = CifParser.from_str(block_text)
                    structures = parser.parse_structures(primitive=False, on_error="raise")
                except Exception as exc:  # pymatgen raises many types for malformed CIF
                    cause = _warning_text(caught)
                    if "_atom_site_" not in block_text.lower():
                        cause = "; ".join(c for c in ("the block has no atom-site loop", cause) if c)
                    message = f"CIF block data_{block} cannot be read: {type(exc).__name__}: {exc}"
                    message += f" ({cause})" if cause else ""
                    raise InputError(
                        " ".join(message.split()),
                        path=path, line=line, value=block, expected="a complete CIF block with cell and atom sites",
                    ) from exc
            if not structures:
                raise InputError(f"CIF block data_{block} holds no structure", path=path, line=line, value=block,
                                 expected="a CIF block with cell and atom sites")
            mismatch = parser.check(structures[0])
            if mismatch and mismatch.startswith(("Missing elements", "Incorrect stoichiometry")):
                raise InputError(
                    f"CIF block data_{block}: the atom sites disagree with the block's "
                    f"_chemical_formula_sum ({' '.join(mismatch.split())}); is the file cut short?",
                    path=path, line=line, value=structures[0].composition.formula,
                    expected="atom sites that add up to the stated formula")
            notes = _warning_text(caught)
            ident = f"{path.stem}-{block}" if several else path.stem
            source = f"{path}:{line}" if several else str(path)
            meta = {"parser_warnings": notes} if notes else {}
            yield _candidate(ident, structures[0], source, path=path, line=line, meta=meta)
        except InputError as exc:
            yield Rejection.from_error(exc)


# --------------------------------------------------------------------------- POSCAR


def read_poscar(text: str, *, path: str | Path = "<string>") -> Any:
    """Parse a VASP 5 POSCAR/CONTCAR text into a pymatgen ``Structure``.

    Parameters
    ----------
    text
        File content: comment, scale (one number, negative = volume in A^3, or three
        numbers), three lattice lines (A), element symbols, counts, optional
        ``Selective dynamics``, ``Direct``/``Cartesian``, then one line per atom.
        Lines after the positions are read only when separated by a blank line
        (velocities in a CONTCAR).
    path
        Used in error messages.

    Raises
    ------
    InputError
        Naming the line for a missing or malformed line, a count that disagrees with
        the element list or with the number of position lines, or an unknown element.
    """
    from pymatgen.core import Element, Lattice, Structure

    path = Path(path)
    lines = text.splitlines()

    def need(k: int, what: str) -> str:
        if k >= len(lines):
            raise InputError(f"file ends before line {k + 1} ({what})", path=path, line=k + 1,
                             expected=what)
        return lines[k]

    def numbers(k: int, n: int, what: str) -> list[float]:
        values = _floats(need(k, what), n)
        if values is None or not all(math.isfinite(v) for v in values):
            raise InputError(f"line {k + 1} is not {what}", path=path, line=k + 1, value=lines[k].strip(),
                             expected=what)
        return values

    scale_parts = need(1, "the scale factor").split()
    if len(scale_parts) >= 3 and _floats(lines[1], 3) is not None:
        scale = np.array(numbers(1, 3, "three scale factors"))
    else:
        scale = np.array(numbers(1, 1, "a scale factor") * 3)
    matrix = np.array([numbers(k, 3, "three lattice-vector components (A)") for k in (2, 3, 4)])
    species_line = need(5, "the element symbols").split()
    if _floats(lines[5], 1) is not None:
        raise InputError("no element symbols on line 6 (VASP 4 format)", path=path, line=6,
                         value=lines[5].strip(), expected="element symbols on line 6, counts on line 7 (VASP 5)")
    symbols = [token.split("_")[0].split("/")[0] for token in species_line]
    for symbol in symbols:
        if not Element.is_valid_symbol(symbol):
            raise InputError(f"unknown element {symbol!r} on line 6", path=path, line=6, value=symbol,
                             expected="chemical element symbols")
    count_parts = need(6, "the atom counts").split()
    try:
        counts = [int(token) for token in count_parts]
    except ValueError as exc:
        raise InputError("line 7 is not a list of atom counts", path=path, line=7, value=lines[6].strip(),
                         expected="one positive integer per element") from exc
    if len(counts) != len(symbols):
        raise InputError(f"line 6 names {len(symbols)} elements but line 7 gives {len(counts)} counts",
                         path=path, line=7, value=lines[6].strip(), expected=f"{len(symbols)} counts")
    if any(c <= 0 for c in counts):
        raise InputError("atom counts must be positive", path=path, line=7, value=lines[6].strip(),
                         expected="positive integers")
    k = 7
    if need(k, "'Direct' or 'Cartesian'").strip()[:1].lower() == "s":
        k += 1
    mode = need(k, "'Direct' or 'Cartesian'").strip()[:1].lower()
    cartesian = mode in ("c", "k")
    if not cartesian and mode != "d":
        raise InputError(f"line {k + 1} is not 'Direct' or 'Cartesian'", path=path, line=k + 1,
                         value=lines[k].strip(), expected="'Direct' or 'Cartesian'")
    total = sum(counts)
    first = k + 1
    coords = []
    for j in range(total):
        row = first + j
        if row >= len(lines) or not lines[row].strip():
            raise InputError(
                f"expected {total} atom positions (counts on line 7) but found {j}",
                path=path, line=row + 1, value=lines[6].strip(), expected=f"{total} position lines",
            )
        coords.append(numbers(row, 3, "three coordinates"))
    after = first + total
    if after < len(lines) and lines[after].strip() and _floats(lines[after], 3) is not None:
        raise InputError(
            f"more atom positions than the counts on line 7 announce ({total})",
            path=path, line=after + 1, value=lines[6].strip(), expected=f"{total} position lines",
        )
    if scale.size == 3 and scale[0] < 0 and np.all(scale == scale[0]):
        volume = abs(np.linalg.det(matrix))
        factor = (abs(scale[0]) / volume) ** (1.0 / 3.0) if volume > 0 else 1.0
        scale = np.full(3, factor)
    matrix = matrix * scale[:, None] if not np.all(scale == scale[0]) else matrix * scale[0]
    species = [s for s, c in zip(symbols, counts) for _ in range(c)]
    positions = np.array(coords)
    if cartesian:
        positions = positions * scale[0]
    return Structure(Lattice(matrix), species, positions, coords_are_cartesian=cartesian)


def _iter_poscar(path: Path) -> Iterator[Candidate | Rejection]:
    try:
        structure = read_poscar(read_utf8_text(path), path=path)
        ident = path.stem
        if path.name.upper() in ("POSCAR", "CONTCAR"):  # one folder per material: use the folder name
            ident = path.resolve().parent.name
        yield _candidate(ident, structure, str(path), path=path, line=None)
    except InputError as exc:
        yield Rejection.from_error(exc)


# --------------------------------------------------------------------------- extended XYZ


def _iter_extxyz(path: Path) -> Iterator[Candidate | Rejection]:
    text = read_utf8_text(path)
    lines = text.splitlines(keepends=True)
    k = 0
    frame = 0
    while k < len(lines):
        if not lines[k].strip():
            k += 1
            continue
        head = lines[k].strip()
        try:
            n_atoms = int(head)
            if n_atoms <= 0:
                raise ValueError(head)
        except ValueError:
            yield Rejection(str(path), k + 1, head[:200],
                            f"frame {frame}: expected the atom count (a positive integer); "
                            "the rest of the file cannot be split into frames")
            return
        block = lines[k : k + 2 + n_atoms]
        start = k + 1
        k += 2 + n_atoms
        if len(block) < 2 + n_atoms or any(not line.strip() for line in block[2:]):
            found = sum(1 for line in block[2:] if line.strip())
            yield Rejection(str(path), start, head,
                            f"frame {frame} announces {n_atoms} atoms but only {found} atom lines follow")
            frame += 1
            continue
        yield _extxyz_frame("".join(block), path, frame, start)
        frame += 1


def _extxyz_frame(block: str, path: Path, frame: int, line: int) -> Candidate | Rejection:
    import ase.io
    from pymatgen.core import Lattice, Structure

    try:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                atoms = ase.io.read(io.StringIO(block), format="extxyz", index=0)
        except Exception as exc:  # ASE raises several types for malformed frames
            raise InputError(f"frame {frame} cannot be read: {type(exc).__name__}: {exc}", path=path, line=line,
                             value=block.splitlines()[1][:200] if "\n" in block else block,
                             expected="an extended XYZ frame") from exc
        info = {str(key).lower(): value for key, value in atoms.info.items()}
        raw_id = info.get("id", info.get("name"))
        ident = str(raw_id) if raw_id is not None else f"{path.stem}-{frame}"
        cell = np.asarray(atoms.cell[:], dtype=float)
        if abs(np.linalg.det(cell)) < MIN_CELL_VOLUME_A3:
            raise InputError(f"frame {frame} has no periodic cell", path=path, line=line, value=str(atoms.cell.cellpar()),
                             expected="a Lattice=\"...\" with three independent vectors")
        structure = Structure(Lattice(cell), atoms.get_chemical_symbols(), atoms.positions,
                              coords_are_cartesian=True)
        return _candidate(ident, structure, f"{path}:{line}", path=path, line=line)
    except InputError as exc:
        return Rejection.from_error(exc)


# --------------------------------------------------------------------------- ASE database


def _iter_ase_db(path: Path) -> Iterator[Candidate | Rejection]:
    from pymatgen.core import Lattice, Structure

    # Check read-only first: ase.db.connect would create tables in a foreign SQLite file.
    try:
        con = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
        try:
            tables = {row[0] for row in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        finally:
            con.close()
    except sqlite3.DatabaseError as exc:
        yield Rejection(str(path), None, path.name, f"not an SQLite database: {exc}")
        return
    if "systems" not in tables:
        yield Rejection(str(path), None, ", ".join(sorted(tables)),
                        "SQLite file is not an ASE database (no 'systems' table)")
        return
    import ase.db

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            db = ase.db.connect(str(path), type="db", create_indices=False)
            rows = db.select()
            for row in rows:
                key = f"id={row.id}"
                try:
                    atoms = row.toatoms()
                    pairs = {str(k).lower(): v for k, v in row.key_value_pairs.items()}
                    raw_id = pairs.get("id", pairs.get("name"))
                    ident = str(raw_id) if raw_id is not None else f"{path.stem}-{row.id}"
                    cell = np.asarray(atoms.cell[:], dtype=float)
                    if abs(np.linalg.det(cell)) < MIN_CELL_VOLUME_A3:
                        raise InputError("row has no periodic cell", path=path, line=key,
                                         value=str(atoms.get_chemical_formula()),
                                         expected="three independent lattice vectors")
                    structure = Structure(Lattice(cell), atoms.get_chemical_symbols(), atoms.positions,
                                          coords_are_cartesian=True)
                    yield _candidate(ident, structure, f"{path}:{key}", path=path, line=key)
                except InputError as exc:
                    yield Rejection.from_error(exc)
                except Exception as exc:  # a damaged row must not stop the others
                    yield Rejection(str(path), key, "", f"row cannot be read: {type(exc).__name__}: {exc}")
    except sqlite3.DatabaseError as exc:
        yield Rejection(str(path), None, path.name, f"database cannot be read: {exc}")


# --------------------------------------------------------------------------- pymatgen JSON


def _iter_pymatgen_json(path: Path) -> Iterator[Candidate | Rejection]:
    from pymatgen.core import Structure

    text = read_utf8_text(path)
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        yield Rejection(str(path), exc.lineno, exc.doc[max(exc.pos - 20, 0) : exc.pos + 20],
                        f"invalid JSON: {exc.msg} (column {exc.colno})")
        return
    several = isinstance(data, list)
    entries = data if several else [data]
    for index, entry in enumerate(entries):
        where = f"[{index}]" if several else None
        try:
            if not isinstance(entry, dict):
                raise InputError("entry is not a JSON object", path=path, line=where, value=str(entry)[:200],
                                 expected="a pymatgen Structure dict")
            struct_dict = entry.get("structure") if isinstance(entry.get("structure"), dict) else entry
            props = struct_dict.get("properties")
            props = props if isinstance(props, dict) else {}
            raw_id = entry.get("id", entry.get("name", props.get("id", props.get("name"))))
            if raw_id is None:
                raw_id = f"{path.stem}-{index}" if several else path.stem
            if "lattice" not in struct_dict or "sites" not in struct_dict:
                raise InputError("entry is not a pymatgen Structure dict (needs 'lattice' and 'sites')",
                                 path=path, line=where, value=", ".join(sorted(map(str, struct_dict)))[:200],
                                 expected="the output of Structure.as_dict()")
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    structure = Structure.from_dict(struct_dict)
            except Exception as exc:  # pymatgen raises KeyError, ValueError, ... for bad dicts
                raise InputError(f"structure cannot be built: {type(exc).__name__}: {exc}", path=path,
                                 line=where, value=str(raw_id), expected="the output of Structure.as_dict()") from exc
            source = f"{path}:{where}" if several else str(path)
            yield _candidate(str(raw_id), structure, source, path=path, line=where)
        except InputError as exc:
            yield Rejection.from_error(exc)


# --------------------------------------------------------------------------- dispatch

_READERS = {
    "cif": _iter_cif,
    "poscar": _iter_poscar,
    "extxyz": _iter_extxyz,
    "db": _iter_ase_db,
    "json": _iter_pymatgen_json,
}


def iter_candidates(
    sources: str | Path | Iterable[str | Path],
    *,
    id_column: str | None = None,
    formula_column: str = "formula",
) -> Iterator[Candidate | Rejection]:
    """Stream candidates from structure files, folders, glob patterns and formula CSVs.

    Parameters
    ----------
    sources
        One source or several: files, folders (read recursively, in sorted order,
        skipping hidden names) or glob patterns (``**`` allowed).
    id_column, formula_column
        Column names used for formula CSV files (no ``id_column``: ``id``, else
        ``name``, else row numbers; see :func:`prescreen.io.formulas.iter_formula_csv`).

    Yields
    ------
    Candidate or Rejection
        Entries in source order. A bad entry, an unreadable or unrecognised file, a
        missing source and an identifier already used by an earlier entry each give a
        :class:`~prescreen.errors.Rejection` (file, line/frame/key, value, reason); the
        iterator itself does not raise for bad input. Memory use is one file (one
        formula row for CSV) plus the set of identifiers seen.
    """
    seen: dict[str, str] = {}
    for item in _expand_sources(sources):
        if isinstance(item, Rejection):
            yield item
            continue
        path = item
        fmt = detect_format(path)
        if fmt is None:
            yield Rejection(str(path), None, path.name,
                            "unrecognised file format; expected CIF, POSCAR/CONTCAR, extended XYZ, "
                            "ASE .db, pymatgen .json or a formula .csv")
            continue
        if fmt == "formulas":
            entries = iter_formula_csv(path, id_column=id_column, formula_column=formula_column)
        else:
            entries = _READERS[fmt](path)
        n_entries = 0
        try:
            for entry in entries:
                n_entries += 1
                if isinstance(entry, Candidate):
                    first = seen.get(entry.id)
                    if first is not None:
                        suffix = entry.source[len(str(path)) + 1 :]
                        where: int | str | None = int(suffix) if suffix.isdigit() else (suffix or None)
                        yield Rejection(str(path), where, entry.id,
                                        f"identifier {entry.id!r} already used by {first}; "
                                        "identifiers must be unique across all sources")
                        continue
                    seen[entry.id] = entry.source
                yield entry
        except InputError as exc:
            n_entries += 1
            yield Rejection.from_error(exc)
        except OSError as exc:
            n_entries += 1
            yield Rejection(str(path), None, path.name, f"cannot read file: {exc}")
        except Exception as exc:  # a reader bug or an input nobody foresaw: keep the other files
            n_entries += 1
            yield Rejection(str(path), None, path.name,
                            f"unexpected error while reading ({type(exc).__name__}: {exc}); "
                            "entries of this file after the last one read were not read")
        if not n_entries:
            yield Rejection(str(path), None, path.name,
                            f"the file holds no entries (read as {fmt})")
