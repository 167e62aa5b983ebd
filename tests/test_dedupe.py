"""Tests for duplicate detection (prescreen.dedupe).

Reference: pymatgen's ``StructureMatcher.group_structures`` must give the same partition.
Structures built with ASE (lattice constants from memory: graphene 2.46 A, hBN 2.50 A,
MoS2 3.18 A; 1H vs 1T-MoS2 are distinct polymorphs, textbook).
"""

from __future__ import annotations

import numpy as np
import pytest
from ase.build import graphene, mx2
from pymatgen.analysis.structure_matcher import StructureMatcher
from pymatgen.core import Structure
from pymatgen.core.operations import SymmOp
from pymatgen.io.ase import AseAtomsAdaptor

from prescreen.candidate import Candidate
from prescreen.dedupe import MATCH_VACUUM_A, composition_key, find_duplicates, matching_form
from prescreen.errors import Rejection


def _pm(atoms):
    atoms = atoms.copy()
    atoms.pbc = True
    return AseAtomsAdaptor.get_structure(atoms)


def _structures():
    gr = _pm(graphene("C2", a=2.46, vacuum=8.0))
    gr_super = gr.copy()
    gr_super.make_supercell([2, 1, 1])
    gr_shift = gr.copy()
    gr_shift.translate_sites(list(range(len(gr_shift))), [0.3, 0.1, 0.05])
    rot = gr.copy()
    rot.apply_operation(SymmOp.from_axis_angle_and_translation([0, 0, 1], 37.0))
    return {
        "gr": gr,
        "hBN": _pm(graphene("BN", a=2.50, vacuum=8.0)),
        "gr-supercell": gr_super,
        "MoS2-1H": _pm(mx2("MoS2", "2H", a=3.18, thickness=3.19, vacuum=8.0)),
        "gr-shifted": gr_shift,
        "MoS2-1T": _pm(mx2("MoS2", "1T", a=3.18, thickness=3.19, vacuum=8.0)),
        "gr-rotated": rot,
        "hBN-strained": _pm(graphene("BN", a=2.52, vacuum=8.0)),  # 0.8 % strain: within ltol
    }


def _candidates(structures):
    return [Candidate(k, s.composition.reduced_formula, "test", s) for k, s in structures.items()]


def test_structure_duplicates_point_to_first_seen():
    dups = find_duplicates(_candidates(_structures()))
    assert dups == {"gr-supercell": "gr", "gr-shifted": "gr", "gr-rotated": "gr", "hBN-strained": "hBN"}


def test_same_partition_as_pymatgen_group_structures():
    structures = _structures()
    dups = find_duplicates(_candidates(structures))
    ours = {}
    for ident in structures:
        ours.setdefault(dups.get(ident, ident), set()).add(ident)
    forms = {k: matching_form(s) for k, s in structures.items()}
    names = {id(s): k for k, s in forms.items()}
    reference = StructureMatcher(scale=False).group_structures(list(forms.values()))  # pymatgen reference
    theirs = [{names[id(s)] for s in group} for group in reference]
    assert sorted(map(sorted, ours.values())) == sorted(map(sorted, theirs))


def test_vacuum_normalisation_separates_polymorphs_and_ignores_vacuum():
    h = _structures()["MoS2-1H"]
    t = _structures()["MoS2-1T"]
    # with 16 A of vacuum pymatgen's default matcher merges the 1H and 1T polymorphs
    assert StructureMatcher(scale=False).fit(h, t)
    thick_vacuum = _pm(mx2("MoS2", "2H", a=3.18, thickness=3.19, vacuum=12.0))
    items = _candidates({"1H": h, "1T": t, "1H-more-vacuum": thick_vacuum})
    assert find_duplicates(items) == {"1H-more-vacuum": "1H"}
    assert matching_form(h).lattice.c == pytest.approx(3.19 + MATCH_VACUUM_A)


def test_first_seen_wins_is_order_dependent_and_deterministic():
    items = _candidates(_structures())
    backwards = find_duplicates(reversed(items))
    assert backwards["gr-supercell"] == "gr-rotated" and backwards["hBN"] == "hBN-strained"
    assert find_duplicates(items) == find_duplicates(list(items))


def test_formula_only_candidates_and_rejections():
    items = [
        Candidate("a", "FeO", "f.csv:2"),
        Rejection("f.csv", 3, "Xx", "unknown element Xx"),
        Candidate("b", "Fe2O2", "f.csv:4"),
        Candidate("c", "Fe0.5O0.5", "f.csv:5"),
        Candidate("d", "Fe2O3", "f.csv:6"),
        Candidate("e", "C", "f.csv:7"),
        Candidate("gr", "C", "g.cif", _structures()["gr"]),  # a structure never repeats a bare formula
    ]
    assert find_duplicates(items) == {"b": "a", "c": "a"}


@pytest.mark.parametrize(("a", "b", "same"), [("FeO", "Fe2O2", True), ("MoS2", "S2Mo", True),
                                              ("MoS2", "MoS3", False), ("Fe0.5O0.5", "OFe", True)])
def test_composition_key(a, b, same):
    assert (composition_key(a) == composition_key(b)) is same


def test_rattled_copy_is_a_duplicate_but_distorted_one_is_not():
    rng = np.random.default_rng(0)
    base = _structures()["MoS2-1H"]
    small = Structure(base.lattice, base.species, base.cart_coords + rng.normal(scale=0.01, size=(len(base), 3)),
                      coords_are_cartesian=True)
    big = base.copy()
    big.scale_lattice(base.volume * 1.8)
    items = _candidates({"base": base, "small": small, "big": big})
    assert find_duplicates(items) == {"small": "base"}


@pytest.mark.parametrize("a_strained", [3.30, 3.50, 3.70])
def test_strained_copy_is_not_a_duplicate(a_strained):
    # 2H-MoS2 at a = 3.16 A and a strained copy (4 % to 17 %): a strain series is a
    # common way to tune band inversions, so each member must stay a candidate.
    from ase.build import mx2
    from pymatgen.io.ase import AseAtomsAdaptor

    from prescreen.candidate import Candidate
    from prescreen.dedupe import find_duplicates

    def layer(a):
        return AseAtomsAdaptor.get_structure(mx2("MoS2", "2H", a=a, thickness=3.13, vacuum=9.0))

    pair = [Candidate("ref", "MoS2", "x", layer(3.16)), Candidate("strained", "MoS2", "y",
                                                                   layer(a_strained))]
    assert find_duplicates(pair) == {}
