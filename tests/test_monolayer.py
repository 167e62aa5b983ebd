"""Tests for the monolayer check against pymatgen's implementation of Larsen et al. (2019).

Reference: ``pymatgen.analysis.dimensionality.get_dimensionality_larsen`` and
``get_structure_components`` on a ``CutOffDictNN`` bonded structure that uses the same
covalent-radius cutoff (1.25 x summed Cordero radii from ``ase.data``). Structures are
built with ASE/pymatgen; lattice constants from memory: MoS2 a = 3.18 A with S-S
thickness 3.19 A, graphene a = 2.46 A, hBN a = 2.50 A, NaCl a = 5.64 A, Si a = 5.43 A,
bulk 2H-MoS2 (P6_3/mmc) a = 3.16 A, c = 12.29 A, S at z = 0.621.
"""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms
from ase.build import bulk, graphene, molecule, mx2
from ase.data import atomic_numbers, covalent_radii
from pymatgen.analysis.dimensionality import get_dimensionality_larsen, get_structure_components
from pymatgen.analysis.local_env import CutOffDictNN
from pymatgen.core import Lattice, Structure
from pymatgen.io.ase import AseAtomsAdaptor

from prescreen.errors import InputError
from prescreen.monolayer import BOND_SCALE, MAX_BULK_GAP_A, MIN_VACUUM_A, check_monolayer


def _pm(atoms: Atoms) -> Structure:
    atoms = atoms.copy()
    atoms.pbc = True
    return AseAtomsAdaptor.get_structure(atoms)


def _mos2(vacuum=8.0):
    return mx2("MoS2", "2H", a=3.18, thickness=3.19, vacuum=vacuum)


def _water_box():
    atoms = molecule("H2O")
    atoms.center(vacuum=6.0)
    return atoms


def _bulk_2h_mos2():
    return Structure.from_spacegroup("P6_3/mmc", Lattice.hexagonal(3.16, 12.29), ["Mo", "S"],
                                     [[1 / 3, 2 / 3, 1 / 4], [1 / 3, 2 / 3, 0.621]])


def _bilayer():
    layer = _mos2()
    top = layer.copy()
    top.translate([0, 0, 6.15])
    layer.extend(top)
    layer.cell[2, 2] += 6.15
    return layer


def _carbon_chain():
    atoms = Atoms("C2", positions=[[0, 0, 0], [1.28, 0, 0]], cell=[2.56, 12.0, 12.0], pbc=True)
    atoms.center(axis=(1, 2))
    return atoms


CASES = {
    "MoS2 monolayer": (lambda: _pm(_mos2()), "monolayer", 2),
    "graphene": (lambda: _pm(graphene("C2", a=2.46, vacuum=8.0)), "monolayer", 2),
    "hBN": (lambda: _pm(graphene("BN", a=2.50, vacuum=8.0)), "monolayer", 2),
    "NaCl rock salt": (lambda: _pm(bulk("NaCl", "rocksalt", a=5.64)), "not_2d", 3),
    "Si diamond": (lambda: _pm(bulk("Si", "diamond", a=5.43)), "not_2d", 3),
    "H2O in a box": (lambda: _pm(_water_box()), "not_2d", 0),
    "carbon chain": (lambda: _pm(_carbon_chain()), "not_2d", 1),
    "bulk 2H-MoS2": (_bulk_2h_mos2, "not_2d", 2),
    "MoS2 bilayer": (lambda: _pm(_bilayer()), "ambiguous", 2),
    "MoS2 little vacuum": (lambda: _pm(_mos2(vacuum=3.5)), "ambiguous", 2),
}


def _larsen_reference(structure: Structure) -> tuple[int, int]:
    """(dimensionality, number of components) from pymatgen's Larsen implementation."""
    elements = [el.symbol for el in structure.composition]
    cutoffs = {
        (a, b): BOND_SCALE * (covalent_radii[atomic_numbers[a]] + covalent_radii[atomic_numbers[b]])
        for a in elements for b in elements
    }
    bonded = CutOffDictNN(cut_off_dict=cutoffs).get_bonded_structure(structure)
    return get_dimensionality_larsen(bonded), len(get_structure_components(bonded))


@pytest.mark.parametrize("name", list(CASES))
def test_status_and_dimensionality_match_pymatgen_larsen(name):
    build, status, dim = CASES[name]
    structure = build()
    result = check_monolayer(structure)
    assert result.status == status, result.reason
    assert (result.dimensionality, result.n_components) == _larsen_reference(structure)
    assert result.dimensionality == dim  # expected class of each control, textbook


@pytest.mark.parametrize(
    ("name", "thickness", "vacuum"),
    [
        ("MoS2 monolayer", 3.19, 16.0),  # mx2(thickness=3.19, vacuum=8) puts 8 A each side
        ("graphene", 0.0, 16.0),
        ("bulk 2H-MoS2", 12.29 * (1 - 0.242), 12.29 * 0.242),  # S-S gap = (0.621-0.379) c
    ],
)
def test_thickness_and_vacuum(name, thickness, vacuum):
    result = check_monolayer(CASES[name][0]())
    assert result.thickness_A == pytest.approx(thickness, abs=1e-6)
    assert result.vacuum_A == pytest.approx(vacuum, abs=1e-6)
    assert result.axis == 2


def _rotation(rng):
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    q = q * np.sign(np.diag(r))
    return q if np.linalg.det(q) > 0 else -q


@pytest.mark.parametrize("name", ["MoS2 monolayer", "hBN", "MoS2 bilayer", "bulk 2H-MoS2", "NaCl rock salt"])
def test_rotation_translation_supercell_and_axis_order_invariance(name):
    rng = np.random.default_rng(7)
    base = CASES[name][0]()
    ref = check_monolayer(base)
    rot = _rotation(rng)
    moved = Structure(Lattice(base.lattice.matrix @ rot.T), base.species, base.cart_coords @ rot.T + rng.normal(size=3),
                      coords_are_cartesian=True)
    bigger = base.copy()
    bigger.make_supercell([2, 2, 1])
    permuted = Structure(Lattice(base.lattice.matrix[[2, 0, 1]]), base.species, base.cart_coords,
                         coords_are_cartesian=True)
    for other in (moved, bigger, permuted):
        got = check_monolayer(other)
        assert got.status == ref.status and got.dimensionality == ref.dimensionality
        if ref.dimensionality != 2:  # gaps along a lattice axis of a bulk cell depend on the cell
            continue
        assert got.thickness_A == pytest.approx(ref.thickness_A, abs=1e-6)
        assert got.vacuum_A == pytest.approx(ref.vacuum_A, abs=1e-6)
    if ref.dimensionality == 2:
        assert check_monolayer(permuted).axis == 0


def test_tilted_stacking_vector_measures_vacuum_perpendicular():
    layer = _pm(_mos2())
    matrix = layer.lattice.matrix.copy()
    matrix[2] = matrix[2] + 0.7 * matrix[0]  # oblique c: the perpendicular gap is unchanged
    tilted = Structure(Lattice(matrix), layer.species, layer.cart_coords, coords_are_cartesian=True)
    result = check_monolayer(tilted)
    assert result.status == "monolayer"
    assert result.vacuum_A == pytest.approx(16.0, abs=1e-6)


@pytest.mark.parametrize("seed", range(12))
def test_rattled_structures_agree_with_pymatgen(seed):
    rng = np.random.default_rng(seed)
    name = list(CASES)[seed % len(CASES)]
    structure = CASES[name][0]()
    rattled = Structure(structure.lattice, structure.species,
                        structure.cart_coords + rng.normal(scale=0.08, size=(len(structure), 3)),
                        coords_are_cartesian=True)
    result = check_monolayer(rattled)
    assert (result.dimensionality, result.n_components) == _larsen_reference(rattled)


def test_ase_atoms_accepted_and_vacuum_thresholds_are_arguments():
    atoms = _mos2(vacuum=8.0)
    atoms.pbc = True
    assert check_monolayer(atoms).status == "monolayer"
    strict = check_monolayer(atoms, min_vacuum_A=20.0)
    assert strict.status == "ambiguous" and "below 20.0 A" in strict.reason
    assert MAX_BULK_GAP_A < MIN_VACUUM_A


def test_disordered_or_empty_structure_is_an_input_error():
    disordered = Structure(Lattice.cubic(4.0), [{"Fe": 0.5, "Co": 0.5}], [[0, 0, 0]])
    with pytest.raises(InputError, match="partially occupied sites"):
        check_monolayer(disordered)
    with pytest.raises(InputError, match="structure has no atoms"):
        check_monolayer(Atoms(cell=[3, 3, 3], pbc=True))
