"""The candidate record that flows from the readers into the campaign store."""

from __future__ import annotations

import sys
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pragma: no cover - typing only
    from pymatgen.core import Structure

__all__ = ["Candidate"]


def atoms_to_structure(item: Any) -> Any:
    """An ``ase.Atoms`` as a pymatgen ``Structure``; anything else unchanged."""
    ase = sys.modules.get("ase")  # an Atoms object means ASE is imported already
    if ase is not None and isinstance(item, ase.Atoms):
        from pymatgen.io.ase import AseAtomsAdaptor

        return AseAtomsAdaptor.get_structure(item)
    return item


@dataclass(frozen=True)
class Candidate:
    """One candidate material as read from a user's source.

    Attributes
    ----------
    id
        Stable identifier: the user's own name where the source has one (file stem,
        database key, CSV column), else ``<file stem>-<position>``. Always a safe
        file-name component (see :func:`prescreen.io.ids.validate_id`).
    formula
        Formula as given or as derived from the structure (e.g. ``"MoS2"``).
    source
        Where it came from, ``path`` or ``path:frame`` or ``path:line``.
    structure
        The periodic structure (pymatgen ``Structure``; an ``ase.Atoms`` is converted),
        or ``None`` for a composition-only candidate (a row of a formula CSV); structure
        descriptors are then missing, never invented.
    meta
        Extra columns the source carried (kept as strings).
    """

    id: str
    formula: str
    source: str
    structure: "Structure | None" = None
    meta: dict[str, str] = field(default_factory=dict, compare=False, hash=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "structure", atoms_to_structure(self.structure))

    @property
    def has_structure(self) -> bool:
        return self.structure is not None
