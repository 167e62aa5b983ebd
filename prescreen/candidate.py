"""The candidate record that flows from the readers into the campaign store."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # pragma: no cover - typing only
    from pymatgen.core import Structure

__all__ = ["Candidate"]


@dataclass(frozen=True)
class Candidate:
    """One candidate material as read from a user's source.

    Attributes
    ----------
    id
        Stable identifier: the user's own name where the source has one (file stem,
        database key, CSV column), else a content hash of the structure. Always a safe
        file-name component (see :func:`prescreen.io.ids.validate_id`).
    formula
        Formula as given or as derived from the structure (e.g. ``"MoS2"``).
    source
        Where it came from, ``path`` or ``path:frame`` or ``path:line``.
    structure
        The periodic structure, or ``None`` for a composition-only candidate
        (a row of a formula CSV); structure descriptors are then missing, never invented.
    meta
        Extra columns the source carried (kept as strings).
    """

    id: str
    formula: str
    source: str
    structure: "Structure | None" = None
    meta: dict[str, str] = field(default_factory=dict, compare=False, hash=False)

    @property
    def has_structure(self) -> bool:
        return self.structure is not None
