"""Finding candidates that repeat an earlier one.

Candidates are grouped by reduced composition; within a group, structures are compared
with pymatgen's ``StructureMatcher`` (tolerances :data:`MATCH_LTOL`,
:data:`MATCH_STOL`, :data:`MATCH_ANGLE_TOL_DEG`, tighter than pymatgen's defaults;
primitive cells and supercells are matched) with ``scale=False``: a uniformly expanded
or strained copy is not the same material. A composition-only
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

from collections.abc import Callable, Iterable
from typing import Any

from prescreen.candidate import Candidate
from prescreen.errors import Rejection

__all__ = ["DuplicateFinder", "FRACTION_DECIMALS", "MATCH_LTOL", "MATCH_STOL", "MATCH_ANGLE_TOL_DEG", "MATCH_VOLUME_RATIO", "default_matcher", "MATCH_VACUUM_A", "composition_key", "find_duplicates", "matching_form"]

#: Decimal places of the atomic fractions that define "same reduced composition"
#: (FeO, Fe2O2 and Fe0.5O0.5 share a key; common practice).
FRACTION_DECIMALS: int = 6


#: StructureMatcher tolerances: fractional lattice-length tolerance, site tolerance (in
#: units of (volume per site)^(1/3)) and angle tolerance in degrees. Tighter than
#: pymatgen's defaults (0.2, 0.3, 5), which call 2H-MoS2 at 3.16 and 3.70 A (17 % strain)
#: the same structure; strain series are a common way to drive band inversions, so a
#: strained copy counts as a different candidate (values: common practice, chosen here).
MATCH_LTOL: float = 0.02
MATCH_STOL: float = 0.1
MATCH_ANGLE_TOL_DEG: float = 2.0


#: Largest ratio of volumes per atom (normalised cells) that can still match: lattice
#: lengths within MATCH_LTOL each give (1 + ltol)^3, and angles within the angle
#: tolerance change an area by a few per cent more (margin 1.05, chosen here). Pairs
#: beyond it are not handed to StructureMatcher at all (a cheap necessary condition).
MATCH_VOLUME_RATIO: float = (1.0 + MATCH_LTOL) ** 3 * 1.05


def default_matcher():
    """The ``StructureMatcher`` used unless one is passed (see :data:`MATCH_LTOL`)."""
    from pymatgen.analysis.structure_matcher import StructureMatcher

    return StructureMatcher(ltol=MATCH_LTOL, stol=MATCH_STOL, angle_tol=MATCH_ANGLE_TOL_DEG,
                            scale=False)


#: Vacuum (A) of the normalised cell in which monolayers are compared: about one van
#: der Waals gap, so the volume per atom is bulk-like (common practice, chosen here;
#: with 3 A, 1H- and 1T-MoS2 no longer match under the default tolerances).
MATCH_VACUUM_A: float = 3.0


def matching_form(structure: Any, check: Any = None) -> Any:
    """The structure as compared by :func:`find_duplicates`.

    Parameters
    ----------
    structure
        A pymatgen ``Structure``.
    check
        Its :class:`prescreen.monolayer.LayerCheck`, if already computed.

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

    if check is None:
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


class DuplicateFinder:
    """Incremental duplicate search: feed candidates one at a time, in order.

    Parameters
    ----------
    existing
        Optional loader ``existing(group_key) -> [(id, structure or None), ...]`` giving
        the non-duplicate candidates already stored for a group, first seen first (the
        campaign store passes one so that new candidates are compared with old ones).
        Called once per group.
    matcher
        A pymatgen ``StructureMatcher``; default :func:`default_matcher`.
    """

    def __init__(self, existing: Callable[[str], list[tuple[str, Any]]] | None = None, *,
                 matcher: Any = None) -> None:
        if matcher is None:
            matcher = default_matcher()
        self._matcher = matcher
        self._existing = existing
        self._formula_first: dict[Any, str] = {}
        self._groups: dict[Any, list[tuple[str, Any]]] = {}

    def _group(self, key: Any, loader_key: str | None) -> list[tuple[str, Any]]:
        group = self._groups.get(key)
        if group is None:
            group = []
            if self._existing is not None and loader_key is not None:
                for ident, structure in self._existing(loader_key):
                    if structure is None:
                        self._formula_first.setdefault(key, ident)
                    else:
                        group.append((ident, matching_form(structure)))
            self._groups[key] = group
        return group

    def duplicate_of(self, ident: str, group_key: str, structure: Any | None,
                     check: Any = None) -> str | None:
        """Return the id ``ident`` repeats (and remember it otherwise).

        Parameters
        ----------
        ident
            The candidate's id.
        group_key
            Its reduced formula (or any key shared exactly by equal compositions).
        structure
            Its structure, or ``None`` for a composition-only candidate.
        check
            Its :class:`prescreen.monolayer.LayerCheck`, if already computed.
        """
        group = self._group(group_key, group_key)
        if structure is None:
            first = self._formula_first.setdefault(group_key, ident)
            return None if first == ident else first
        form = matching_form(structure, check)
        vpa = form.volume / len(form)
        for other, other_form in group:
            ratio = vpa / (other_form.volume / len(other_form))
            if max(ratio, 1.0 / ratio) > MATCH_VOLUME_RATIO:
                continue  # cannot match within the lattice tolerances
            if self._matcher.fit(other_form, form):
                return other
        group.append((ident, form))
        return None


def find_duplicates(candidates: Iterable[Candidate | Rejection], *, matcher: Any = None) -> dict[str, str]:
    """Map each repeated candidate's id to the id of the first candidate it repeats.

    Parameters
    ----------
    candidates
        Candidates in input order, e.g. straight from
        :func:`prescreen.io.structures.iter_candidates`; Rejections in the stream are
        skipped (they were reported by the reader).
    matcher
        A pymatgen ``StructureMatcher``; default :func:`default_matcher`.

    Returns
    -------
    dict[str, str]
        ``{duplicate_id: first_id}``; candidates that repeat nothing are absent.
        Memory: one representative structure per distinct structure kept.
    """
    finder = DuplicateFinder(matcher=matcher)
    duplicates: dict[str, str] = {}
    for candidate in candidates:
        if not isinstance(candidate, Candidate):
            continue
        comp = candidate.formula if candidate.structure is None else candidate.structure.composition
        first = finder.duplicate_of(candidate.id, composition_key(comp), candidate.structure)
        if first is not None:
            duplicates[candidate.id] = first
    return duplicates
