"""Fast batch parsing of chemical formulas into padded element/amount arrays.

The composition featurisers work on whole tables at once, so formulas are parsed into
two padded arrays: ``z`` (atomic numbers, 0 = padding) and ``amount`` (atoms per formula
as written, 0 = padding). Each distinct formula is parsed once. Plain formulas
(``MoS2``, ``Fe0.5O0.5``, ``CH3COOH``) take a fast path of one regular-expression match
per formula and numpy for everything else; formulas with parentheses or brackets
(``Ca(OH)2``, ``[Fe(CN)6]K3``) and simple hydrates written with ``·`` or ``*``
(``CuSO4·5H2O``) go through a small stack parser.

A repeated element is summed (``CH3COOH`` is C2 H4 O2), as pymatgen's ``Composition``
does. A dot directly after a number is a decimal point, so ``CuSO4.5H2O`` reads as
``O4.5`` (also as in pymatgen); write hydrates with ``·`` or ``*``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import lru_cache
from typing import Sequence

import numpy as np
import pandas as pd

from prescreen.errors import InputError

__all__ = ["ParsedFormulas", "parse_formulas", "parse_one", "element_symbols", "MAX_Z"]

#: Largest atomic number understood (Og); the Magpie tables cover Z = 1-118.
MAX_Z = 118

_EXPECTED = "a formula of element symbols with positive amounts, e.g. MoS2, Fe0.5O0.5, Ca(OH)2"
_NUM = r"(?:\d+(?:\.\d*)?|\.\d+)"
_SIMPLE_RE = re.compile(rf"(?:[A-Z][a-z]?{_NUM}?)+")
_TOKEN_RE = re.compile(rf"([A-Z][a-z]?)({_NUM}?)")
_GENERAL_TOKEN_RE = re.compile(rf"\s*(?:([A-Z][a-z]?)|([(\[{{])|([)\]}}])|({_NUM}))")
_HYDRATE_SEP_RE = re.compile(r"[·*•]")
_CLOSE_OF = {"(": ")", "[": "]", "{": "}"}


@lru_cache(maxsize=1)
def element_symbols() -> tuple[str, ...]:
    """Element symbols indexed by atomic number (index 0 is the empty padding symbol)."""
    from pymatgen.core.periodic_table import Element

    return ("",) + tuple(Element.from_Z(z).symbol for z in range(1, MAX_Z + 1))


@lru_cache(maxsize=1)
def _z_of() -> dict[str, int]:
    return {s: z for z, s in enumerate(element_symbols()) if s}


@dataclass(frozen=True)
class ParsedFormulas:
    """A batch of parsed formulas as padded arrays.

    Attributes
    ----------
    z
        ``(n, k)`` int array of atomic numbers, 0 where padded; k is the largest number
        of distinct elements in the batch (at least 1).
    amount
        ``(n, k)`` float array of atoms per formula as written, 0 where padded.
    errors
        ``(n,)`` object array: ``None`` for a parsed row, else the error message. Rows
        with an error have all-zero ``z`` and ``amount``.
    """

    z: np.ndarray
    amount: np.ndarray
    errors: np.ndarray

    @property
    def ok(self) -> np.ndarray:
        """``(n,)`` bool: rows that parsed."""
        return np.array([e is None for e in self.errors], dtype=bool)


def _bad(message: str, formula: object, line: int | str | None) -> InputError:
    return InputError(message, line=line, value=formula, expected=_EXPECTED)


def _parse_group(text: str, formula: str, line: int | str | None) -> dict[str, float]:
    """Stack parser for formulas with brackets (one hydrate part, no separators)."""
    stack: list[dict[str, float]] = [{}]
    opened: list[str] = []
    pos = 0
    last: dict[str, float] | str | None = None  # what a following number multiplies
    while pos < len(text):
        m = _GENERAL_TOKEN_RE.match(text, pos)
        if m is None or m.end() == pos:
            if text[pos:].strip() == "":
                break
            raise _bad(f"unexpected character {text[pos]!r} at position {pos}", formula, line)
        symbol, open_br, close_br, number = m.groups()
        pos = m.end()
        if symbol is not None:
            if symbol not in _z_of():
                raise _bad(f"unknown element symbol {symbol!r}", formula, line)
            stack[-1][symbol] = stack[-1].get(symbol, 0.0) + 1.0
            last = symbol
        elif open_br is not None:
            stack.append({})
            opened.append(open_br)
            last = None
        elif close_br is not None:
            if not opened or _CLOSE_OF[opened[-1]] != close_br:
                raise _bad(f"unbalanced bracket {close_br!r}", formula, line)
            opened.pop()
            inner = stack.pop()
            if not inner:
                raise _bad("empty brackets", formula, line)
            outer = stack[-1]
            for k, v in inner.items():
                outer[k] = outer.get(k, 0.0) + v
            last = inner
        else:
            value = float(number)
            if last is None:
                raise _bad(f"number {number!r} does not follow an element or bracket", formula, line)
            if isinstance(last, str):
                stack[-1][last] += value - 1.0
            else:
                for k, v in last.items():
                    stack[-1][k] += v * (value - 1.0)
            last = None
    if opened:
        raise _bad(f"unclosed bracket {opened[-1]!r}", formula, line)
    return stack[0]


def parse_one(formula: str, *, line: int | str | None = None) -> dict[str, float]:
    """Parse one formula into ``{symbol: amount}`` (repeated elements summed).

    Parameters
    ----------
    formula
        E.g. ``"MoS2"``, ``"Fe0.5O0.5"``, ``"Ca(OH)2"``, ``"CuSO4·5H2O"``.
    line
        Entry number or key, used in the error message.

    Returns
    -------
    dict
        Element symbol to number of atoms (float, > 0), in order of first appearance.

    Raises
    ------
    InputError
        On an empty formula, an unknown symbol, unbalanced brackets, a stray character or
        a zero amount; the message names the entry and the bad value.
    """
    if not isinstance(formula, str):
        raise _bad(f"formula must be text, not {type(formula).__name__}", formula, line)
    text = formula.strip()
    if not text:
        raise _bad("formula is empty", formula, line)
    total: dict[str, float] = {}
    for part in _HYDRATE_SEP_RE.split(text):
        part = part.strip()
        m = re.match(rf"^{_NUM}", part)
        factor = 1.0
        after = part[m.end():m.end() + 1] if m else ""
        if after and (after.isalpha() or after in "([{"):
            factor = float(m.group(0))
            part = part[m.end():]
        if not part:
            raise _bad("empty part in a hydrate formula", formula, line)
        if _SIMPLE_RE.fullmatch(part):
            parsed: dict[str, float] = {}
            z_of = _z_of()
            for sym, num in _TOKEN_RE.findall(part):
                if sym not in z_of:
                    raise _bad(f"unknown element symbol {sym!r}", formula, line)
                parsed[sym] = parsed.get(sym, 0.0) + (float(num) if num else 1.0)
        else:
            parsed = _parse_group(part, formula, line)
        for k, v in parsed.items():
            total[k] = total.get(k, 0.0) + factor * v
    if not total:
        raise _bad("formula has no elements", formula, line)
    zero = [k for k, v in total.items() if not v > 0.0]
    if zero:
        raise _bad(f"amount of {zero[0]} is not positive", formula, line)
    return total


def parse_formulas(formulas: Sequence[str], *, first_line: int = 0) -> ParsedFormulas:
    """Parse a batch of formulas into padded arrays; bad rows get an error message.

    Parameters
    ----------
    formulas
        ``n`` formulas.
    first_line
        Entry number of ``formulas[0]`` used in error messages (rows are numbered
        ``first_line, first_line + 1, ...``).

    Returns
    -------
    ParsedFormulas
        ``z`` and ``amount`` of shape ``(n, k)`` and ``errors`` of shape ``(n,)``.
    """
    n = len(formulas)
    codes, uniques = pd.factorize(pd.Series(list(formulas), dtype=object), use_na_sentinel=False)
    uniques = list(uniques)
    n_u = len(uniques)
    z_of = _z_of()
    # fast path: plain formulas, one regex fullmatch + findall each, numpy for the rest
    simple_idx: list[int] = []
    tokens: list[list[tuple[str, str]]] = []
    general: list[int] = []
    fullmatch = _SIMPLE_RE.fullmatch
    findall = _TOKEN_RE.findall
    for i, f in enumerate(uniques):
        if isinstance(f, str) and fullmatch(f):
            simple_idx.append(i)
            tokens.append(findall(f))
        else:
            general.append(i)
    counts = np.fromiter((len(t) for t in tokens), dtype=np.int64, count=len(tokens))
    flat = [tok for t in tokens for tok in t]
    syms = [s for s, _ in flat]
    zs = np.fromiter((z_of.get(s, -1) for s in syms), dtype=np.int64, count=len(syms))
    nums = np.array([a if a else "1" for _, a in flat] or ["1"], dtype=object)[: len(flat)]
    amounts = nums.astype(np.float64) if len(flat) else np.zeros(0)
    owner = np.repeat(np.asarray(simple_idx, dtype=np.int64), counts)
    errors_u: list[str | None] = [None] * n_u
    bad_sym = zs < 0
    if bad_sym.any():
        for j in np.flatnonzero(bad_sym):
            u = int(owner[j])
            if errors_u[u] is None:
                errors_u[u] = f"unknown element symbol {syms[j]!r}"
    # slow path: brackets, hydrates, anything else (errors are collected, not raised)
    g_owner: list[int] = []
    g_z: list[int] = []
    g_amt: list[float] = []
    for i in general:
        try:
            parsed = parse_one(uniques[i])
        except InputError as exc:
            errors_u[i] = exc.reason
            continue
        for sym, amt in parsed.items():
            g_owner.append(i)
            g_z.append(z_of[sym])
            g_amt.append(amt)
    owner = np.concatenate([owner, np.asarray(g_owner, dtype=np.int64)])
    zs = np.concatenate([zs, np.asarray(g_z, dtype=np.int64)])
    amounts = np.concatenate([amounts, np.asarray(g_amt, dtype=np.float64)])
    failed = np.array([e is not None for e in errors_u], dtype=bool)
    keep = ~failed[owner] if len(owner) else np.zeros(0, dtype=bool)
    owner, zs, amounts = owner[keep], zs[keep], amounts[keep]
    # sum repeated elements within a formula: one key per (formula, element)
    key = owner * (MAX_Z + 1) + zs
    ukey, inv = np.unique(key, return_inverse=True)
    summed = np.bincount(inv, weights=amounts, minlength=len(ukey))
    u_owner = ukey // (MAX_Z + 1)
    u_z = ukey % (MAX_Z + 1)
    nonpos = summed <= 0.0
    for j in np.flatnonzero(nonpos):
        u = int(u_owner[j])
        if errors_u[u] is None:
            errors_u[u] = f"amount of {element_symbols()[u_z[j]]} is not positive"
    n_el = np.bincount(u_owner, minlength=n_u)
    k = max(int(n_el.max()) if len(n_el) else 1, 1)
    start = np.concatenate([[0], np.cumsum(n_el)[:-1]]) if n_u else np.zeros(0, dtype=np.int64)
    slot = np.arange(len(ukey)) - start[u_owner]
    z_u = np.zeros((n_u, k), dtype=np.int64)
    amt_u = np.zeros((n_u, k), dtype=np.float64)
    z_u[u_owner, slot] = u_z
    amt_u[u_owner, slot] = summed
    for u, e in enumerate(errors_u):
        if e is not None:
            z_u[u] = 0
            amt_u[u] = 0.0
    empty = n_el == 0
    for u in np.flatnonzero(empty):
        if errors_u[u] is None:
            errors_u[u] = "formula is empty" if isinstance(uniques[u], str) else (
                f"formula must be text, not {type(uniques[u]).__name__}")
    errors = np.empty(n, dtype=object)
    err_u = np.array(errors_u + [None], dtype=object)[:n_u]
    errors[:] = err_u[codes] if n else []
    for row in np.flatnonzero(pd.notna(errors)):
        value = formulas[row]
        reason = str(errors[row])
        if value is None:
            reason = "formula is missing"
        elif not isinstance(value, str):
            reason = f"formula must be text, not {type(value).__name__}"
        err = InputError(reason, line=first_line + int(row), value=value, expected=_EXPECTED)
        errors[row] = str(err)
    return ParsedFormulas(z=z_u[codes], amount=amt_u[codes], errors=errors)
