"""Relaxation of positions and in-plane cell with a stress tensor
(prescreen.physics.dft.stress_relax, the stage of relax_monolayer_pw that needs no DFT).

The reference is independent of any stress tensor: the minimum over the in-plane lattice
of the relaxed-ion energy, found by relaxing the positions (BFGS, forces only) on a
fine grid of lattice constants. The energy surface is ASE's EMT potential: A. H. Larsen
et al., "The atomic simulation environment", J. Phys.: Condens. Matter 29, 273002
(2017); K. W. Jacobsen, P. Stoltze, J. K. Norskov, Surf. Sci. 366, 394 (1996). EMT is
not meant for such layers; it serves as a smooth surface whose buckling couples to the
lattice, as in the buckled layers of the dataset.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from prescreen.physics.dft import LayerBroke, honeycomb_monolayer, prepare_monolayer, stress_relax

pytest.importorskip("ase")
from ase.calculators.emt import EMT  # noqa: E402
from ase.optimize import BFGS  # noqa: E402

FMAX = 1e-3
VIRIAL_TOL = 1e-3


def _layer(symbols, a, gamma_deg=120.0):
    layer = prepare_monolayer(honeycomb_monolayer(symbols, a, buckling=0.6), 12.0)
    if gamma_deg != 120.0:  # shear a2 about the normal, lengths kept
        cell = np.array(layer.cell)
        t = math.radians(gamma_deg)
        cell[1] = a * np.array([math.cos(t), math.sin(t), 0.0])
        layer.set_cell(cell, scale_atoms=True)
    layer.calc = EMT()
    return layer


def _relaxed_ion_minimum(symbols, a_guess):
    """Lattice constant at the lowest relaxed-ion energy: positions relaxed at each a of
    a grid, a parabola through the lowest point and its neighbours."""
    xs = np.linspace(0.90, 1.10, 41) * a_guess
    energies = []
    for a in xs:
        layer = _layer(symbols, a)
        BFGS(layer, logfile=None).run(fmax=1e-5, steps=1000)
        energies.append(layer.get_potential_energy())
    j = int(np.argmin(energies))
    assert 0 < j < len(xs) - 1, "the grid must bracket the minimum"
    c = np.polyfit(xs[j - 1:j + 2], energies[j - 1:j + 2], 2)
    return -c[1] / (2 * c[0])


def _in_plane_virial(atoms):
    return atoms.get_volume() * atoms.get_stress(voigt=True)[[0, 1, 5]]


@pytest.mark.parametrize("symbols, a_start", [("Cu2", 2.75), ("Au2", 2.65), ("Pt2", 2.85)])
def test_the_stress_relaxed_lattice_is_the_minimum_of_the_relaxed_ion_energy(symbols,
                                                                             a_start):
    reference = _relaxed_ion_minimum(symbols, a_start)
    layer = _layer(symbols, a_start)
    c_before = np.array(layer.cell[2])
    ok, steps = stress_relax(layer, FMAX, VIRIAL_TOL, 500)
    assert ok and 0 < steps < 500
    # the grid spacing is 0.5 %; the parabola through three points is finer than that
    assert layer.cell.lengths()[0] == pytest.approx(reference, rel=1e-3)
    assert np.abs(_in_plane_virial(layer)).max() < VIRIAL_TOL
    assert np.linalg.norm(layer.get_forces(), axis=1).max() < FMAX
    np.testing.assert_allclose(layer.cell[2], c_before, atol=1e-12)  # vacuum kept


def test_the_angle_between_the_in_plane_vectors_relaxes_too():
    # a honeycomb sheared to 115 degrees: hexagonal symmetry puts it back at 120
    layer = _layer("Cu2", 2.45, gamma_deg=115.0)
    ok, _ = stress_relax(layer, FMAX, VIRIAL_TOL, 1000)
    assert ok
    assert layer.cell.angles()[2] == pytest.approx(120.0, abs=0.1)
    a, b = layer.cell.lengths()[:2]
    assert a == pytest.approx(b, rel=1e-3)


def test_the_virial_tolerance_sets_where_the_cell_stops():
    loose, tight = _layer("Au2", 2.45), _layer("Au2", 2.45)
    _, n_loose = stress_relax(loose, 0.05, 0.2, 500)
    _, n_tight = stress_relax(tight, 0.05, 1e-3, 500)
    assert np.abs(_in_plane_virial(loose)).max() < 0.2
    assert np.abs(_in_plane_virial(tight)).max() < 1e-3
    assert n_loose < n_tight


def test_a_layer_that_breaks_stops_the_relaxation_with_its_geometry():
    layer = _layer("Cu2", 3.40)  # far from its minimum: more than four steps
    calls = []

    def check(atoms):
        calls.append(len(atoms))
        return "the check says it broke"

    with pytest.raises(LayerBroke, match="after 4 steps") as err:
        stress_relax(layer, FMAX, VIRIAL_TOL, 500, check_layer=check)
    assert calls == [2]  # called once, at step 4
    assert err.value.reason == "the check says it broke"
    assert err.value.structure.calc is None and len(err.value.structure) == 2


def test_a_cell_whose_third_vector_is_tilted_is_refused():
    # the mask frees in-plane strains only; with c tilted, its in-plane part would move
    from prescreen.errors import InputError

    layer = _layer("Cu2", 2.45)
    cell = np.array(layer.cell)
    cell[2, 0] = 0.5
    layer.set_cell(cell)
    with pytest.raises(InputError, match="c along z"):
        stress_relax(layer, FMAX, VIRIAL_TOL, 10)


def test_the_pulay_term_is_gpaws_own_estimate_summed_over_the_atoms():
    # Reference: GPAW's own tool for the energy's variation with the plane-wave cutoff,
    # ``python -m gpaw.utilities.ekin -d ECUT NAME`` (LDA setups), run as a subprocess;
    # GPAW's older plane-wave mode adds (2/3) ecut dE/d(ecut) to V sigma
    # (gpaw/old/wavefunctions/pw.py and gpaw/old/stress.py).
    import re
    import subprocess
    import sys

    pytest.importorskip("gpaw")
    from prescreen.physics.dft import pulay_virial_eV

    def tool(name, ecut):
        out = subprocess.run([sys.executable, "-m", "gpaw.utilities.ekin", "-d", str(ecut),
                              name], capture_output=True, text=True, check=True).stdout
        return float(re.search(r"=\s*(-?[0-9.]+)", out).group(1))

    expected = 2 / 3 * 500 * (2 * tool("O", 500) + tool("Ta", 500))
    assert pulay_virial_eV(["Ta", "O", "O"], 500.0, xc="LDA") == pytest.approx(expected,
                                                                              rel=1e-3)
    assert expected < -1.0  # oxygen's tail is far from converged at 500 eV


def test_layers_with_n_o_or_f_get_the_higher_cutoff():
    from prescreen.physics.dft import DEFAULT_PW_ECUT_EV, HARD_PW_ECUT_EV, plane_wave_cutoff_eV

    assert plane_wave_cutoff_eV(["Mo", "S", "S"]) == DEFAULT_PW_ECUT_EV
    assert plane_wave_cutoff_eV(["Ta", "Ta", "N", "O", "O"]) == HARD_PW_ECUT_EV
    assert plane_wave_cutoff_eV(["Sc", "F"]) == HARD_PW_ECUT_EV
