"""Z2 from DFT parity eigenvalues (prescreen.physics.parity).

Reference facts:

* The Fu-Kane criterion, (-1)^nu = prod over the four TRIMs of the product of occupied
  Kramers-pair parities (Fu and Kane, Phys. Rev. B 76, 045302 (2007)).
* Buckled Bi honeycomb (Bi(111) bilayer): a quantum spin Hall insulator, nu = 1
  (Murakami, Phys. Rev. Lett. 97, 236805 (2006); from memory).
* Stanene (buckled Sn honeycomb): a quantum spin Hall insulator, nu = 1 (Xu et al.,
  Phys. Rev. Lett. 111, 136804 (2013); from memory).
* 1T-HfS2 monolayer: a trivial semiconductor, nu = 0 (from memory).
* Point groups: the 1T (octahedral, D3d) MX2 layer has an inversion centre, the 2H
  (trigonal-prismatic, D3h) layer has none (International Tables for Crystallography,
  Vol. A, point groups -3m and -6m2; from memory).

Lattice constants and bucklings (Angstrom) as in tests/test_dft.py, from memory; 1T-HfS2
a = 3.63, S-S height 2.9 (PBE values near the bulk experiment, from memory).
"""

from __future__ import annotations


import numpy as np
import pytest
from ase.build import mx2

from prescreen.errors import InputError
from prescreen.physics.dft import LabelSettings, honeycomb_monolayer, prepare_monolayer
from prescreen.physics.parity import (
    PARITY_TOL,
    TRIMS,
    _inversion_in_basis,
    even_mesh,
    inversion_map,
    z2_from_parities,
)

MESH = LabelSettings(kpts=(6, 6, 1))  # even and a multiple of 3: every TRIM and K


def test_octahedral_layer_maps_onto_itself_under_inversion():
    atoms = prepare_monolayer(mx2("MoS2", "1T", a=3.18, thickness=3.0, vacuum=8.0))
    inv = inversion_map(atoms)
    t, partner, shift = inv.t, inv.partner, inv.shift
    x = inv.atoms.get_scaled_positions()  # wrapped, as GPAW reads them
    numbers = atoms.get_atomic_numbers()
    assert np.allclose(-x + t, x[partner] + shift, atol=1e-12)  # the definition, exact
    assert inv.max_move_A < 1e-6  # ASE's 1T layer is centrosymmetric already
    assert (numbers[partner] == numbers).all()
    assert sorted(partner) == list(range(len(atoms)))  # a permutation
    mo = int(np.flatnonzero(numbers == 42)[0])
    assert partner[mo] == mo  # the metal sits on the centre; the two S swap
    s1, s2 = np.flatnonzero(numbers == 16)
    assert (partner[s1], partner[s2]) == (s2, s1)


def test_trigonal_prismatic_layer_has_no_inversion_centre():
    atoms = prepare_monolayer(mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=8.0))
    with pytest.raises(InputError, match="no inversion centre"):
        inversion_map(atoms)


def test_inversion_on_the_basis_squares_to_one_at_every_trim():
    inv = inversion_map(prepare_monolayer(honeycomb_monolayer("Sn2", 4.67, 0.85)))
    partner, shift = inv.partner, inv.shift
    layout = [(a, j, ell) for a in range(2) for j, ell in enumerate((0, 1, 2))
              for _ in range(2 * ell + 1)]
    for trim in TRIMS:
        D = _inversion_in_basis(layout, partner, shift, np.asarray(trim))
        assert np.allclose(D @ D, np.eye(len(layout)))  # I^2 = 1
        assert np.allclose(D.conj().T @ D, np.eye(len(layout)))  # unitary


@pytest.mark.parametrize(("mesh", "even"), [
    ((9, 9, 1), (12, 12, 1)),  # a hexagonal mesh keeps K (a multiple of 3)
    ((15, 15, 1), (18, 18, 1)),
    ((5, 7, 1), (6, 8, 1)),
    ((6, 10, 1), (6, 10, 1)),
])
def test_meshes_are_rounded_up_to_even_keeping_multiples_of_three(mesh, even):
    assert even_mesh(mesh) == even


def test_a_slightly_broken_inversion_is_found_and_made_exact_in_gpaws_frame():
    # 1T layer rotated into an oblique frame, an S atom 3 mA off its symmetric place and
    # the metal on a cell corner, where wrapping sends 1 - 1e-16 to 0 or leaves it
    from ase.build import mx2

    atoms = prepare_monolayer(mx2("HfS2", "1T", a=3.63, thickness=2.9, vacuum=8.0))
    x = atoms.get_scaled_positions(wrap=False)
    x[0, :2] = [1.0 - 1e-16, -1e-17]
    atoms.set_scaled_positions(x)
    atoms.positions[1] += [0.003, 0.0, 0.0]
    inv = inversion_map(atoms)
    assert 0.001 < inv.max_move_A < 0.003
    w = inv.atoms.get_scaled_positions()
    assert np.allclose(-w + inv.t, w[inv.partner] + inv.shift, atol=1e-12)
    atoms.positions[1] += [0.05, 0.0, 0.0]  # 0.05 A off: not centrosymmetric any more
    with pytest.raises(InputError, match="no inversion centre"):
        inversion_map(atoms)


def test_magnetic_settings_are_refused():
    with pytest.raises(InputError, match="time-reversal symmetry"):
        z2_from_parities(honeycomb_monolayer("Sn2", 4.67, 0.85), LabelSettings(spinpol=True))


@pytest.mark.dft
@pytest.mark.parametrize(("name", "structure", "z2"), [
    ("Bi2-buckled", lambda: honeycomb_monolayer("Bi2", 4.33, 1.73), 1),  # Murakami 2006
    ("Sn2-buckled", lambda: honeycomb_monolayer("Sn2", 4.67, 0.85), 1),  # Xu et al. 2013
    ("HfS2-1T", lambda: mx2("HfS2", "1T", a=3.63, thickness=2.9, vacuum=7.5), 0),  # trivial
])
def test_z2_of_reference_monolayers(name, structure, z2):
    result = z2_from_parities(structure(), MESH, id=name)
    assert result.z2 == z2
    assert result.parity_error < PARITY_TOL
    assert all(n % 2 == 0 for n in result.n_minus)  # Kramers pairs
    assert int(np.prod(result.delta)) == (-1) ** z2
    assert result.kmesh == (6, 6, 1) and result.direct_gap_soc_eV > 0.02
