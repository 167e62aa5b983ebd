"""Candidate identifiers: validation (safe as a file name) and content hashes.

An identifier ends up in file names inside a campaign folder (cached features, DFT
work directories), so it must never be able to act as a path: no separators, no
``..``, no leading dot, no reserved device names, bounded length.
"""

from __future__ import annotations

import hashlib
import re
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from prescreen.errors import InputError

if TYPE_CHECKING:  # pragma: no cover - typing only
    from pymatgen.core import Structure

__all__ = [
    "ID_MAX_LENGTH",
    "ID_PATTERN",
    "CONTENT_ID_PREFIX",
    "validate_id",
    "content_id",
]

#: Longest accepted identifier, in characters. Common practice: well below the
#: 255-byte file-name limit of ext4/NTFS so that suffixes can still be appended.
ID_MAX_LENGTH: int = 128

#: Characters allowed in an identifier (a portable file-name component, POSIX
#: "portable filename character set", IEEE Std 1003.1 section 3.282).
ID_PATTERN: re.Pattern[str] = re.compile(r"[A-Za-z0-9._-]+")

#: Prefix of identifiers made from a structure's content.
CONTENT_ID_PREFIX: str = "s-"

#: Names that Windows reserves for devices, whatever the extension (Microsoft docs,
#: "Naming Files, Paths, and Namespaces").
_RESERVED = frozenset(
    ["CON", "PRN", "AUX", "NUL"]
    + [f"COM{i}" for i in range(1, 10)]
    + [f"LPT{i}" for i in range(1, 10)]
)

_EXPECTED = (
    f"1-{ID_MAX_LENGTH} characters from A-Z a-z 0-9 . _ -, "
    "not starting with '.', without '..'"
)

#: Decimal places kept for fractional coordinates in :func:`content_id` (1e-4 of a
#: lattice vector is ~1e-3 A for a 10 A cell; common practice for structure hashing).
_FRAC_DECIMALS = 4
#: Decimal places kept for lattice matrix entries (A) in :func:`content_id`.
_LATTICE_DECIMALS = 3


def validate_id(raw: str, *, path: str | Path | None = None, line: int | str | None = None) -> str:
    """Return ``raw`` stripped of surrounding blanks if it is a safe identifier.

    Parameters
    ----------
    raw
        The identifier as the user wrote it (file stem, database key, CSV cell).
    path, line
        Where it came from, used in the error message.

    Returns
    -------
    str
        The identifier, safe as a single file-name component.

    Raises
    ------
    InputError
        If the identifier is empty, too long, contains characters other than
        ``A-Z a-z 0-9 . _ -``, starts with a dot, contains ``..`` or is a reserved
        device name.
    """
    if not isinstance(raw, str):
        raise InputError("identifier is not text", path=path, line=line, value=raw, expected=_EXPECTED)
    ident = raw.strip()
    problem = None
    if not ident:
        problem = "identifier is empty"
    elif len(ident) > ID_MAX_LENGTH:
        problem = f"identifier is {len(ident)} characters long"
    elif ID_PATTERN.fullmatch(ident) is None:
        bad = sorted({c for c in ident if ID_PATTERN.fullmatch(c) is None})
        problem = "identifier contains unsafe characters " + " ".join(repr(c) for c in bad)
    elif ident.startswith("."):
        problem = "identifier starts with '.'"
    elif ".." in ident:
        problem = "identifier contains '..'"
    elif ident.split(".")[0].upper() in _RESERVED:
        problem = "identifier is a reserved device name"
    if problem is not None:
        raise InputError(problem, path=path, line=line, value=raw, expected=_EXPECTED)
    return ident


def content_id(structure: "Structure") -> str:
    """Return a stable identifier made from a structure's content.

    The structure is canonicalised before hashing: fractional coordinates are
    wrapped into [0, 1) and rounded, sites are sorted by (element, coordinates) and the
    lattice matrix is rounded, so the identifier does not depend on site order, on
    which periodic image a site was written in, or on noise below the rounding.
    It does depend on the choice of cell (a rotated or supercell copy hashes
    differently; finding those is the job of :mod:`prescreen.dedupe`).

    Parameters
    ----------
    structure
        A pymatgen ``Structure``.

    Returns
    -------
    str
        ``"s-"`` followed by 16 hexadecimal digits (64 bits of SHA-256).
    """
    frac = np.asarray(structure.frac_coords, dtype=float) % 1.0
    frac = np.round(frac, _FRAC_DECIMALS) % 1.0
    frac = np.where(np.isclose(frac, 1.0, atol=10.0**-_FRAC_DECIMALS), 0.0, frac) + 0.0
    labels = [str(site.species) for site in structure]
    order = sorted(range(len(labels)), key=lambda k: (labels[k], *frac[k]))
    lattice = np.round(np.asarray(structure.lattice.matrix, dtype=float), _LATTICE_DECIMALS) + 0.0
    digest = hashlib.sha256()
    digest.update(" ".join(f"{x:.{_LATTICE_DECIMALS}f}" for x in lattice.ravel()).encode())
    for k in order:
        coords = " ".join(f"{x:.{_FRAC_DECIMALS}f}" for x in frac[k])
        digest.update(f"|{labels[k]} {coords}".encode())
    return CONTENT_ID_PREFIX + digest.hexdigest()[:16]
