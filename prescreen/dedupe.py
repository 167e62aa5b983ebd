"""Finding candidates that repeat an earlier one.

Candidates are grouped by reduced composition; within a group, structures are compared
with pymatgen's ``StructureMatcher`` (default tolerances ltol 0.2, stol 0.3,
angle_tol 5 degrees; primitive cells and supercells are matched) with ``scale=False``:
a uniformly expanded copy is not the same material. A composition-only
candidate (no structure) repeats the first composition-only candidate with the same
reduced composition; it is never matched against a structure, because a formula does
not say which polymorph it means.

Vacuum is part of a slab's cell, and StructureMatcher scales its site tolerance by
the volume per atom, so with 15 A of vacuum it cannot tell 1H- from 1T-MoS2. Structures
that :func:`prescreen.monolayer.check_monolayer` calls monolayers are therefore
compared in a normalised cell: the same in-plane vectors and an out-of-plane vector
along the layer normal of length thickness + :data:`MATCH_VACUUM_A`. The same layer
stored with different vacuum is then a duplicate too.

The result only records which candidate repeats which: nothing is deleted. The first
candidate seen wins, so the outcome depends only on the input order.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

from prescreen.candidate import Candidate
from prescreen.errors import Rejection

__all__ = ["FRACTION_DECIMALS", "MATCH_VACUUM_A", "composition_key", "find_duplicates", "matching_form"]

#: Decimal places of the atomic fractions that define "same reduced composition"
#: (FeO, Fe2O2 and Fe0.5O0.5 share a key; common practice).
FRACTION_DECIMALS: int = 6


#: Vacuum (A) of the normalised cell in which monolayers are compared: about one van
#: der Waals gap, so the volume per atom is bulk-like (common practice, chosen here;
#: with 3 A, 1H- and 1T-MoS2 no longer match under the default tolerances).
MATCH_VACUUM_A: float = 3.0


def matching_form(structure: Any) -> Any:
    """The structure as compared by :func:`find_duplicates`.

    Parameters
    ----------
    structure
        A pymatgen ``Structure``.

    Returns
    -------
    pymatgen.core.Structure
        For a monolayer whose layer plane holds two of the lattice vectors: a copy with
        the third vector replaced by ``normal * (thickness + MATCH_VACUUM_A)`` and the
        atoms placed in one contiguous slab; otherwise the structure itself.
    """
    import numpy as np
    from pymatgen.core import Lattice, Structure

    from prescreen.monolayer import check_monolayer

    check = check_monolayer(structure)
    if check.status != "monolayer" or check.normal is None:
        return structure
    normal = np.asarray(check.normal)
    matrix = np.asarray(structure.lattice.matrix, dtype=float)
    in_plane = [k for k in range(3) if k != check.axis]
    if any(abs(matrix[k] @ normal) > 1e-6 * np.linalg.norm(matrix[k]) for k in in_plane):
        return structure
    period = abs(float(matrix[check.axis] @ normal))
    cart = np.asarray(structure.cart_coords, dtype=float)
    heights = cart @ normal
    wrapped = np.sort(heights % period)
    gaps = np.diff(np.concatenate([wrapped, wrapped[:1] + period]))
    bottom = wrapped[(int(np.argmax(gaps)) + 1) % len(wrapped)]  # first atom above the widest gap
    new_heights = (heights - bottom) % period
    new_heights = np.where(new_heights > period - 1e-9, 0.0, new_heights)
    cart = cart - np.outer(heights, normal) + np.outer(new_heights, normal)
    new_matrix = matrix.copy()
    new_matrix[check.axis] = normal * (check.thickness_A + MATCH_VACUUM_A)
    return Structure(Lattice(new_matrix), structure.species, cart, coords_are_cartesian=True)


def composition_key(formula_or_composition: Any) -> tuple[tuple[str, float], ...]:
    """Key shared by formulas of the same reduced composition.

    Parameters
    ----------
    formula_or_composition
        A formula string or a pymatgen ``Composition``.

    Returns
    -------
    tuple of (str, float)
        Sorted (element, atomic fraction rounded to :data:`FRACTION_DECIMALS`) pairs.
    """
    from pymatgen.core import Composition

    comp = formula_or_composition if isinstance(formula_or_composition, Composition) else Composition(
        formula_or_composition
    )
    fractions = comp.fractional_composition
    return tuple(sorted((str(el), round(float(amount), FRACTION_DECIMALS)) for el, amount in fractions.items()))


def find_duplicates(candidates: Iterable[Candidate | Rejection], *, matcher: Any = None) -> dict[str, str]:
    """Map each repeated candidate's id to the id of the first candidate it repeats.

    Parameters
    ----------
    candidates
        Candidates in input order, e.g. straight from
        :func:`prescreen.io.structures.iter_candidates`; Rejections in the stream are
        skipped (they were reported by the reader).
    matcher
        A pymatgen ``StructureMatcher``; default ``StructureMatcher(scale=False)``.

    Returns
    -------
    dict[str, str]
        ``{duplicate_id: first_id}``; candidates that repeat nothing are absent.
        Memory: one representative structure per distinct structure kept.
    """
    if matcher is None:
        from pymatgen.analysis.structure_matcher import StructureMatcher

        matcher = StructureMatcher(scale=False)
    duplicates: dict[str, str] = {}
    first_formula: dict[tuple, str] = {}
    representatives: dict[tuple, list[tuple[str, Any]]] = {}
    for candidate in candidates:
        if not isinstance(candidate, Candidate):
            continue
        if candidate.structure is None:
            key = composition_key(candidate.formula)
            first = first_formula.setdefault(key, candidate.id)
            if first != candidate.id:
                duplicates[candidate.id] = first
            continue
        key = composition_key(candidate.structure.composition)
        group = representatives.setdefault(key, [])
        form = matching_form(candidate.structure)
        for ident, structure in group:
            if matcher.fit(structure, form):
                duplicates[candidate.id] = ident
                break
        else:
            group.append((candidate.id, form))
    return duplicates
