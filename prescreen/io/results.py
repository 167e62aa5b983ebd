"""Reading DFT results (spillage per candidate) from CSV or JSON, with row validation.

Columns / keys (names matched ignoring case; ``k_mesh``/``k-mesh`` and
``core-hours`` are accepted spellings):

=====================  =========  =====================================================
name                   required   meaning
=====================  =========  =====================================================
``id``                 yes        candidate identifier (see :func:`prescreen.io.ids.validate_id`)
``spillage``           yes        spin-orbit spillage, a finite number >= 0
``functional``         no         exchange-correlation functional, e.g. ``PBE``
``code``               no         DFT code that produced it
``kmesh``              no         k-point mesh, three positive integers (``12x12x1``)
``core_hours``         no         CPU cost, a finite number >= 0 (core hours)
``gap_soc_eV``         no         band gap with spin-orbit coupling, eV (0 for a metal);
                                  lets a model require a gap (``min_gap_eV``)
``direct_gap_soc_eV``  no         smallest direct gap with spin-orbit coupling over the k
                                  points, eV (at least ``gap_soc_eV``); where it is open,
                                  the occupied states and a Z2 invariant are defined, in a
                                  band-inverted semimetal too
``notes``              no         free text
=====================  =========  =====================================================

A JSON file holds a list of objects with these keys, or ``{"results": [...]}``.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from prescreen.errors import InputError, Rejection
from prescreen.io.formulas import iter_csv_records, read_utf8_text
from prescreen.io.ids import validate_id

__all__ = ["RESULT_COLUMNS", "ResultRow", "read_results", "results_from_frame", "unknown_ids"]

#: Canonical column names, in output order.
RESULT_COLUMNS: tuple[str, ...] = ("id", "spillage", "functional", "code", "kmesh", "core_hours",
                                   "gap_soc_eV", "direct_gap_soc_eV", "notes")

_ALIASES = {
    "id": "id", "spillage": "spillage", "functional": "functional", "code": "code",
    "kmesh": "kmesh", "k_mesh": "kmesh", "k-mesh": "kmesh",
    "core_hours": "core_hours", "core-hours": "core_hours", "notes": "notes",
    "gap_soc_ev": "gap_soc_eV", "direct_gap_soc_ev": "direct_gap_soc_eV",
}
_KMESH = re.compile(r"\s*(\d+)\s*[x×, ]\s*(\d+)\s*[x×, ]\s*(\d+)\s*")

ConflictPolicy = Literal["reject", "first", "last"]


@dataclass(frozen=True)
class ResultRow:
    """One validated DFT result.

    Attributes
    ----------
    id
        Candidate identifier.
    spillage
        Spin-orbit spillage (dimensionless, >= 0).
    functional, code, kmesh, notes
        Optional metadata (``kmesh`` normalised to ``"AxBxC"``); ``None`` when absent.
    core_hours
        CPU cost of the calculation in core hours, or ``None``.
    gap_soc_eV
        Band gap with spin-orbit coupling (eV; 0 for a metal), or ``None``.
    direct_gap_soc_eV
        Smallest direct gap with spin-orbit coupling over k (eV), or ``None``.
    source
        ``"path:line"`` (CSV) or ``"path:[index]"`` (JSON) of the row.
    """

    id: str
    spillage: float
    functional: str | None = None
    code: str | None = None
    kmesh: str | None = None
    core_hours: float | None = None
    notes: str | None = None
    source: str = ""
    gap_soc_eV: float | None = None
    direct_gap_soc_eV: float | None = None

    def values(self) -> tuple[Any, ...]:
        """Everything except ``source``: two rows with equal values say the same thing."""
        return (self.id, self.spillage, self.functional, self.code, self.kmesh, self.core_hours,
                self.notes, self.gap_soc_eV, self.direct_gap_soc_eV)


def _number(raw: Any, name: str, *, path: Path, line: int | str, required: bool) -> float | None:
    expected = f"{name} as a finite number >= 0"
    if raw is None or (isinstance(raw, str) and not raw.strip()):
        if required:
            raise InputError(f"{name} is missing", path=path, line=line, value="", expected=expected)
        return None
    if isinstance(raw, bool) or not isinstance(raw, (int, float, str)):
        raise InputError(f"{name} is not a number", path=path, line=line, value=str(raw), expected=expected)
    try:
        value = float(raw)
    except ValueError as exc:
        raise InputError(f"{name} is not a number", path=path, line=line, value=raw, expected=expected) from exc
    if not math.isfinite(value):
        raise InputError(f"{name} is not finite", path=path, line=line, value=str(raw), expected=expected)
    if value < 0:
        raise InputError(f"{name} is negative", path=path, line=line, value=str(raw), expected=expected)
    return value


#: Largest band gap accepted, eV: the widest gaps of real solids (LiF, about 14 eV; from
#: memory) stay below it, while a gap given in meV by mistake lands far above.
MAX_GAP_EV: float = 20.0


#: Rounding allowed when a direct gap is compared with the band gap, eV (values printed
#: to 3 decimals; common practice).
GAP_ROUNDING_EV: float = 1e-3


def _gap(fields: dict[str, Any], name: str, *, path: Path, line: int | str) -> float | None:
    """An optional gap column: a number >= 0 and at most :data:`MAX_GAP_EV`."""
    gap = _number(fields.get(name), name, path=path, line=line, required=False)
    if gap is not None and gap > MAX_GAP_EV:
        raise InputError(f"{name} above {MAX_GAP_EV:g} eV", path=path, line=line,
                         value=str(fields.get(name)),
                         expected="a band gap in eV (was it given in meV?)")
    return gap


def _text(raw: Any) -> str | None:
    if raw is None:
        return None
    text = str(raw).strip()
    return text or None


def _row(fields: dict[str, Any], *, path: Path, line: int | str, source: str) -> ResultRow:
    ident = validate_id(str(fields.get("id") or ""), path=path, line=line)
    spillage = _number(fields.get("spillage"), "spillage", path=path, line=line, required=True)
    core_hours = _number(fields.get("core_hours"), "core_hours", path=path, line=line, required=False)
    gap, direct = (_gap(fields, name, path=path, line=line)
                   for name in ("gap_soc_eV", "direct_gap_soc_eV"))
    if gap is not None and direct is not None and direct < gap - GAP_ROUNDING_EV:
        raise InputError("direct_gap_soc_eV below gap_soc_eV", path=path, line=line,
                         value=f"{fields.get('direct_gap_soc_eV')} < {fields.get('gap_soc_eV')}",
                         expected="the smallest direct gap, which is at least the band gap "
                                  "(its minimum over k)")
    kmesh = _text(fields.get("kmesh"))
    if kmesh is not None:
        match = _KMESH.fullmatch(kmesh)
        if match is None or any(int(g) <= 0 for g in match.groups()):
            raise InputError("kmesh is not three positive integers", path=path, line=line, value=kmesh,
                             expected="a k-point mesh such as 12x12x1")
        kmesh = "x".join(str(int(g)) for g in match.groups())
    assert spillage is not None
    return ResultRow(id=ident, spillage=spillage, functional=_text(fields.get("functional")),
                     code=_text(fields.get("code")), kmesh=kmesh, core_hours=core_hours,
                     notes=_text(fields.get("notes")), source=source, gap_soc_eV=gap,
                     direct_gap_soc_eV=direct)


def _canonical_names(names: Iterable[str], *, path: Path, line: int | str) -> tuple[dict[str, str], list[str]]:
    """Map the file's names to canonical ones; return the mapping and the unknown names."""
    mapping: dict[str, str] = {}
    unknown = []
    for name in names:
        key = _ALIASES.get(str(name).strip().lower())
        if key is None:
            unknown.append(str(name))
        elif key in mapping.values():
            raise InputError(f"column {key!r} appears twice", path=path, line=line, value=str(name),
                             expected="each column once")
        else:
            mapping[str(name)] = key
    return mapping, unknown


def _iter_csv(path: Path) -> Iterable[tuple[int | str, str, dict[str, Any]] | Rejection]:
    found: dict[str, Any] = {}

    def check(header: list[str], line: int) -> None:
        mapping, unknown = _canonical_names(header, path=path, line=line)
        _require(mapping, path, header, line)
        found.update(mapping=mapping, unknown=unknown, line=line)

    for item in iter_csv_records(path, on_header=check):
        if "unknown" in found:
            for name in found.pop("unknown"):
                if name == "":  # pandas' unnamed index column: nothing in it is a result
                    continue
                yield Rejection(str(path), found["line"], name,
                                "column is not used; known columns are " + ", ".join(RESULT_COLUMNS))
        if isinstance(item, Rejection):
            yield item
            continue
        line, fields = item
        mapping = found["mapping"]
        yield line, f"{path}:{line}", {mapping[k]: v for k, v in fields.items() if k in mapping}


def _require(mapping: dict[str, str], path: Path, header: list[str], line: int) -> None:
    for needed in ("id", "spillage"):
        if needed not in mapping.values():
            hint = ""
            if len(header) == 1 and any(ch in header[0] for ch in "\t;"):
                hint = "; the header is one field: is the file separated by commas?"
            raise InputError(f"no {needed!r} column{hint}", path=path, line=line,
                             value=",".join(header),
                             expected="columns id and spillage (optional: "
                                      + ", ".join(RESULT_COLUMNS[2:]) + ")")


def _iter_json(path: Path) -> Iterable[tuple[int | str, str, dict[str, Any]] | Rejection]:
    text = read_utf8_text(path, expected="a UTF-8 JSON file")
    try:
        document = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"invalid JSON: {exc.msg} (column {exc.colno})", path=path, line=exc.lineno,
                         value=text[max(exc.pos - 20, 0) : exc.pos + 20], expected="a JSON list of result objects") from exc
    if isinstance(document, dict) and isinstance(document.get("results"), list):
        document = document["results"]
    if not isinstance(document, list):
        raise InputError("JSON document is not a list of results", path=path, value=type(document).__name__,
                         expected='a list of objects, or {"results": [...]}')
    for index, entry in enumerate(document):
        where = f"[{index}]"
        if not isinstance(entry, dict):
            yield Rejection(str(path), where, str(entry)[:200], "entry is not a JSON object")
            continue
        mapping, unknown = _canonical_names(entry, path=path, line=where)
        for name in unknown:
            yield Rejection(str(path), where, name, "key is not used; known keys are " + ", ".join(RESULT_COLUMNS))
        yield where, f"{path}:{where}", {mapping[k]: v for k, v in entry.items() if k in mapping}


def _is_json(path: Path) -> bool:
    if path.suffix.lower() == ".json":
        return True
    if path.suffix.lower() == ".csv":
        return False
    with path.open("rb") as handle:
        head = handle.read(64).lstrip(b"\xef\xbb\xbf \t\r\n")
    return head[:1] in (b"[", b"{")


def read_results(
    path: str | Path, *, on_conflict: ConflictPolicy = "reject"
) -> tuple[list[ResultRow], list[Rejection]]:
    """Read and validate a file of DFT results.

    Parameters
    ----------
    path
        CSV (header line) or JSON file; see the module docstring for the columns.
    on_conflict
        What to do when one id appears on several rows with different values:
        ``"reject"`` (default) refuses all of them, ``"first"``/``"last"`` keeps that
        row and rejects the others. Rows that repeat exactly are kept once.

    Returns
    -------
    rows : list of ResultRow
        The valid rows in file order (one per id).
    rejections : list of Rejection
        One per refused row, unused column or undecodable line, with file, line,
        value and reason.

    Raises
    ------
    InputError
        If the file cannot be used at all: missing ``id``/``spillage`` column, invalid
        JSON, or bytes that are not UTF-8 in the header (CSV) or anywhere (JSON); the
        message names the byte offset.
    """
    path = Path(path)
    _check_policy(on_conflict)
    if not path.is_file():
        raise InputError("no such results file", path=path, expected="a CSV or JSON file")
    entries = _iter_json(path) if _is_json(path) else _iter_csv(path)
    return _collect(entries, path, on_conflict)


def results_from_frame(frame: Any, *, name: str = "dataframe",
                       on_conflict: ConflictPolicy = "reject",
                       ) -> tuple[list[ResultRow], list[Rejection]]:
    """Validate results held in a pandas DataFrame, with the rules of :func:`read_results`.

    Columns as in a results file (``id`` may also be the index's name); each row is
    located as ``<name>:<index label>`` in messages and in the stored provenance.
    Returns the ``(rows, rejections)`` pair that
    :meth:`prescreen.campaign.Campaign.ingest_results` takes.
    """
    import pandas as pd

    _check_policy(on_conflict)
    if not isinstance(frame, pd.DataFrame):
        raise InputError("not a pandas DataFrame", value=type(frame).__name__,
                         expected="a DataFrame with columns id and spillage")
    if frame.index.name is not None and str(frame.index.name).strip().lower() == "id":
        frame = frame.reset_index()
    mapping, unknown = _canonical_names(frame.columns, path=Path(name), line="columns")
    _require(mapping, Path(name), [str(c) for c in frame.columns], 1)

    def entries() -> Iterable[tuple[int | str, str, dict[str, Any]] | Rejection]:
        for column in unknown:
            yield Rejection(name, "columns", column,
                            "column is not used; known columns are " + ", ".join(RESULT_COLUMNS))
        for label, row in zip(frame.index, frame.to_dict("records")):
            fields = {mapping[k]: (None if pd.isna(v) else v) for k, v in row.items()
                      if k in mapping}
            yield str(label), f"{name}:{label}", fields

    return _collect(entries(), Path(name), on_conflict)


def _check_policy(on_conflict: str) -> None:
    if on_conflict not in ("reject", "first", "last"):
        raise InputError("unknown conflict policy", value=on_conflict, expected="'reject', 'first' or 'last'")


def _collect(entries: Iterable[tuple[int | str, str, dict[str, Any]] | Rejection], path: Path,
             on_conflict: ConflictPolicy) -> tuple[list[ResultRow], list[Rejection]]:
    """Validate entries into rows (one per id, in order) and rejections."""
    rejections: list[Rejection] = []
    by_id: dict[str, list[ResultRow]] = {}
    for item in entries:
        if isinstance(item, Rejection):
            rejections.append(item)
            continue
        line, source, fields = item
        try:
            row = _row(fields, path=path, line=line, source=source)
        except InputError as exc:
            rejections.append(Rejection.from_error(exc))
            continue
        by_id.setdefault(row.id, []).append(row)
    rows: list[ResultRow] = []
    for ident, group in by_id.items():
        if len({r.values() for r in group}) == 1:
            rows.append(group[0])
            continue
        if on_conflict == "reject":
            keep = None
        else:
            keep = group[0] if on_conflict == "first" else group[-1]
            rows.append(keep)
        listing = "; ".join(f"{r.source.rsplit(':', 1)[-1]}: {r.spillage:g}" for r in group)
        for r in group:
            if keep is not None and r.values() == keep.values():
                continue
            where = r.source.rsplit(":", 1)[-1]
            reason = (f"id {ident!r} appears {len(group)} times with different values ({listing}); "
                      + ("keep one row per id in the file, or choose which one counts "
                         "(on the command line: --repeats first or --repeats last)"
                         if keep is None else f"kept the {on_conflict} one"))
            rejections.append(Rejection(str(path), _line(where), f"{r.spillage:g}", reason))
    rows.sort(key=lambda r: _order_key(r.source))
    return rows, rejections


def _line(where: str) -> int | str:
    return int(where) if where.isdigit() else where


def _order_key(source: str) -> tuple[int, str]:
    where = source.rsplit(":", 1)[-1]
    if where.isdigit():
        return int(where), ""
    digits = where.strip("[]")
    return (int(digits), "") if digits.isdigit() else (0, where)


def unknown_ids(rows: Iterable[ResultRow], known_ids: Iterable[str] | set[str]) -> list[Rejection]:
    """Rejections for result rows whose id is not a known candidate.

    Parameters
    ----------
    rows
        Result rows, e.g. from :func:`read_results`.
    known_ids
        Identifiers of the campaign's candidates (a set is used as is).

    Returns
    -------
    list of Rejection
        One per row with an unknown id, naming file, line and id.
    """
    known = known_ids if isinstance(known_ids, (set, frozenset)) else set(known_ids)
    out = []
    for row in rows:
        if row.id not in known:
            path, _, where = row.source.rpartition(":")
            out.append(Rejection(path, _line(where), row.id,
                                 "id is not a candidate of this campaign; add the candidate first or fix the id"))
    return out
