"""Composition-only candidates from a CSV of formulas, and the streaming CSV reader.

The CSV reader is shared with :mod:`prescreen.io.results`: it decodes each physical
line on its own, so a line with bytes that are not UTF-8 becomes a :class:`Rejection`
naming that line while the rest of the file is still read, and it reports the
physical line number where each record starts (quoted fields may span lines).
"""

from __future__ import annotations

import csv
import re
from collections import deque
from collections.abc import Callable, Iterator
from pathlib import Path

from prescreen.candidate import Candidate
from prescreen.errors import InputError, Rejection
from prescreen.io.ids import validate_id

__all__ = ["CsvRecord", "iter_csv_records", "iter_formula_csv", "parse_formula", "read_utf8_text"]

#: ``(line, fields)``: 1-based physical line where the record starts, and the record
#: as a mapping from (stripped) header name to (stripped) cell text.
CsvRecord = tuple[int, dict[str, str]]

_SHOWN_BYTES = 40


def _undecodable(path: Path, lineno: int, offset: int, raw: bytes, exc: UnicodeDecodeError) -> InputError:
    start = max(exc.start - 10, 0)
    snippet = raw[start : exc.start + 10]
    return InputError(
        f"bytes that are not UTF-8 at byte offset {offset + exc.start} "
        f"(byte {raw[exc.start]:#04x})",
        path=path,
        line=lineno,
        value=repr(snippet)[:_SHOWN_BYTES * 2],
        expected="a UTF-8 text file",
    )


def read_utf8_text(path: str | Path, *, expected: str = "a UTF-8 text file") -> str:
    """Read a whole (small) text file as UTF-8, dropping a byte-order mark.

    Raises
    ------
    InputError
        Naming the line and byte offset of the first byte that is not UTF-8.
    """
    path = Path(path)
    data = path.read_bytes()
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputError(
            f"bytes that are not UTF-8 at byte offset {exc.start} (byte {data[exc.start]:#04x})",
            path=path, line=data.count(b"\n", 0, exc.start) + 1,
            value=data[max(exc.start - 10, 0) : exc.start + 10], expected=expected,
        ) from exc


def iter_csv_records(path: str | Path, *,
                     on_header: Callable[[list[str], int], None] | None = None,
                     ) -> Iterator[CsvRecord | Rejection]:
    """Stream the records of a CSV file with a header line.

    Parameters
    ----------
    path
        The CSV file (UTF-8, optionally with a byte-order mark).
    on_header
        Called with the header's names and its line as soon as the header is read,
        before any record (it may raise :class:`InputError` to refuse the file).

    Yields
    ------
    tuple[int, dict[str, str]] or Rejection
        Each data record with the line where it starts, or a :class:`Rejection` for a
        line that cannot be decoded or a record whose number of fields differs from the
        header's. Blank lines are skipped.

    Raises
    ------
    InputError
        If the file is empty, its header cannot be decoded (the message names the byte
        offset), or the header repeats a column name.
    """
    path = Path(path)
    pending: deque[Rejection] = deque()
    # (count of lines fed to the csv reader, physical line number) for lines not yet consumed
    fed: deque[tuple[int, int]] = deque()
    header_error: list[InputError] = []

    def feed() -> Iterator[str]:
        offset = 0
        count = 0
        with path.open("rb") as handle:
            for lineno, raw in enumerate(handle, start=1):
                try:
                    text = raw.decode("utf-8")
                except UnicodeDecodeError as exc:
                    error = _undecodable(path, lineno, offset, raw, exc)
                    if count == 0:  # the header itself cannot be read: the file cannot be used
                        header_error.append(error)
                        return
                    error.reason += "; the line was skipped"
                    pending.append(Rejection.from_error(error))
                    offset += len(raw)
                    continue
                offset += len(raw)
                if lineno == 1 and text.startswith("\ufeff"):
                    text = text[1:]
                count += 1
                fed.append((count, lineno))
                yield text

    reader = csv.reader(feed(), strict=False)
    header: list[str] | None = None
    consumed = 0
    while True:
        try:
            record = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            start = _start_line(fed, consumed + 1)
            consumed = reader.line_num
            pending.append(Rejection(str(path), start, "", f"CSV syntax error: {exc}"))
            yield from _drain(pending)
            continue
        start = _start_line(fed, consumed + 1)
        consumed = reader.line_num
        if header is None:
            if not record or not any(cell.strip() for cell in record):
                continue
            header = [cell.strip() for cell in record]
            repeated = sorted({name for name in header if header.count(name) > 1})
            if repeated:
                raise InputError(
                    "header repeats column names", path=path, line=start, value=", ".join(repeated),
                    expected="each column name once",
                )
            if on_header is not None:
                on_header(header, start)
            yield from _drain(pending)
            continue
        yield from _drain(pending)
        if not record or not any(cell.strip() for cell in record):
            continue
        if len(record) != len(header):
            yield Rejection(
                str(path), start, ",".join(record)[:200],
                f"row has {len(record)} fields but the header has {len(header)}",
            )
            continue
        yield start, {name: cell.strip() for name, cell in zip(header, record)}
    if header_error:
        raise header_error[0]
    yield from _drain(pending)
    if header is None:
        raise InputError("file has no header line", path=path, expected="a CSV header line")


def _start_line(fed: deque[tuple[int, int]], count: int) -> int:
    """Physical line number of the ``count``-th fed line; forget the lines before it."""
    while len(fed) > 1 and fed[0][0] < count:
        fed.popleft()
    return fed[0][1] if fed else 0


def _drain(pending: deque[Rejection]) -> Iterator[Rejection]:
    while pending:
        yield pending.popleft()


def parse_formula(text: str, *, path: str | Path | None = None, line: int | str | None = None):
    """Parse a chemical formula into a pymatgen ``Composition`` of real elements.

    Parameters
    ----------
    text
        The formula, e.g. ``"MoS2"`` or ``"Fe0.5O0.5"``.
    path, line
        Where it came from, used in the error message.

    Returns
    -------
    pymatgen.core.Composition

    Raises
    ------
    InputError
        If the formula is empty, cannot be parsed, has non-positive amounts or names a
        symbol that is not a chemical element.
    """
    from pymatgen.core import Composition, Element

    expected = "a formula of chemical elements with positive amounts, e.g. MoS2"
    if not text or not text.strip():
        raise InputError("formula is empty", path=path, line=line, value=text, expected=expected)
    try:
        comp = Composition(text)
    except Exception as exc:  # pymatgen raises ValueError, KeyError, ... for bad formulas
        raise InputError(f"formula cannot be parsed: {exc}", path=path, line=line, value=text,
                         expected=expected) from exc
    unknown = [getattr(el, "symbol", str(el)) for el in comp if not isinstance(el, Element)]
    if unknown:
        raise InputError(f"unknown element {', '.join(unknown)}", path=path, line=line, value=text,
                         expected=expected)
    if len(comp) == 0 or comp.num_atoms <= 0:
        raise InputError("formula has no atoms", path=path, line=line, value=text, expected=expected)
    # pymatgen drops a zero amount silently ("Mo0S2" becomes S2): refuse it instead.
    dropped = sorted(set(re.findall(r"[A-Z][a-z]?", text)) - {el.symbol for el in comp})
    if dropped:
        raise InputError(f"amount of {', '.join(dropped)} is zero", path=path, line=line,
                         value=text, expected=expected)
    return comp


#: ID columns looked for, in order, when no ID column is named.
DEFAULT_ID_COLUMNS: tuple[str, ...] = ("id", "name")


def iter_formula_csv(
    path: str | Path, *, id_column: str | None = None, formula_column: str = "formula"
) -> Iterator[Candidate | Rejection]:
    """Stream composition-only candidates from a CSV of formulas.

    Parameters
    ----------
    path
        CSV file with a header line holding ``formula_column`` and optionally
        ``id_column``; other columns are kept as ``Candidate.meta`` strings.
    id_column, formula_column
        Header names (matched exactly, else ignoring case). Without ``id_column`` the
        first of :data:`DEFAULT_ID_COLUMNS` present is used; a named ``id_column`` that
        the header lacks rejects the file.

    Yields
    ------
    Candidate or Rejection
        One :class:`Candidate` with ``structure=None`` per valid row (``id`` from the id
        column, else ``"<file stem>-<row number>"``), or a :class:`Rejection` naming the
        line, value and reason. A file that cannot be used at all gives one Rejection.
    """
    path = Path(path)
    stem = path.stem
    columns: tuple[str | None, str] | None = None
    row_number = 0
    try:
        for item in iter_csv_records(path):
            if isinstance(item, Rejection):
                yield item
                continue
            line, fields = item
            if columns is None:
                if id_column is None:
                    id_key = next((k for k in (_find_column(fields, c)
                                               for c in DEFAULT_ID_COLUMNS) if k), None)
                else:
                    id_key = _find_column(fields, id_column)
                    if id_key is None:
                        yield Rejection(str(path), 1, ", ".join(fields),
                                        f"no ID column {id_column!r} in the header")
                        return
                formula_key = _find_column(fields, formula_column)
                if formula_key is None:
                    yield Rejection(str(path), 1, ", ".join(fields),
                                    f"no formula column {formula_column!r} in the header")
                    return
                columns = (id_key, formula_key)
            id_key, formula_key = columns
            row_number += 1
            try:
                raw_id = fields[id_key] if id_key is not None else f"{stem}-{row_number}"
                ident = validate_id(raw_id, path=path, line=line)
                formula = fields[formula_key]
                parse_formula(formula, path=path, line=line)
            except InputError as exc:
                yield Rejection.from_error(exc)
                continue
            meta = {k: v for k, v in fields.items() if k not in (id_key, formula_key)}
            yield Candidate(id=ident, formula=formula.replace(" ", ""), source=f"{path}:{line}",
                            structure=None, meta=meta)
    except InputError as exc:
        yield Rejection.from_error(exc)
    except OSError as exc:
        yield Rejection(str(path), None, str(path), f"cannot read file: {exc}")


def _find_column(fields: dict[str, str], wanted: str) -> str | None:
    if wanted in fields:
        return wanted
    lowered = {name.lower(): name for name in fields}
    return lowered.get(wanted.lower())
