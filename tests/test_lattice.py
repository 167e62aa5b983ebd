"""In-plane lattice refinement from energies alone (prescreen.physics.dft.refine_lattice).

The reference is ASE's stress-based cell relaxation (``FrechetCellFilter`` with the
in-plane strains free) on ASE's EMT potential, which has an analytic stress tensor:
A. H. Larsen et al., "The atomic simulation environment", J. Phys.: Condens. Matter 29,
273002 (2017); EMT: K. W. Jacobsen, P. Stoltze, J. K. Norskov, Surf. Sci. 366, 394
(1996). EMT is not meant for such layers; it serves here as a smooth energy surface
whose buckling couples to the lattice, as in the buckled layers of the dataset.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from prescreen.errors import InputError
from prescreen.physics.dft import (
    LATTICE_TOL,
    honeycomb_monolayer,
    prepare_monolayer,
    refine_lattice,
    strain_modes,
)

pytest.importorskip("ase")
from ase.calculators.emt import EMT  # noqa: E402
from ase.filters import FrechetCellFilter  # noqa: E402
from ase.optimize import BFGS  # noqa: E402


def _attach(atoms, tag, reference):
    assert not np.allclose(reference.cell, atoms.cell)  # the unstrained cell
    atoms.calc = EMT()


def _relax(atoms, tag):
    atoms.calc = EMT()
    return bool(BFGS(atoms, logfile=None).run(fmax=1e-4, steps=500))


def _stress_relaxed(atoms):
    """ASE's answer: in-plane cell and positions relaxed with the EMT stress."""
    ref = atoms.copy()
    ref.calc = EMT()
    BFGS(FrechetCellFilter(ref, mask=[1, 1, 0, 0, 0, 0]), logfile=None).run(
        fmax=1e-5, steps=3000)
    return ref


def _clamped_minimum(atoms):
    """In-plane lattice length at the lowest energy of a fine scan with the positions
    held fractional (the scan that refine_lattice replaces)."""
    xs = np.linspace(0.85, 1.15, 121)
    energies = []
    for x in xs:
        trial = atoms.copy()
        cell = np.array(trial.cell)
        cell[:2] *= x
        trial.set_cell(cell, scale_atoms=True)
        trial.calc = EMT()
        energies.append(trial.get_potential_energy())
    return atoms.cell.lengths()[0] * xs[int(np.argmin(energies))]


def _buckled(symbols, a):
    layer = prepare_monolayer(honeycomb_monolayer(symbols, a, buckling=0.6), 12.0)
    _relax(layer, "start")  # the refinement starts from relaxed positions
    return layer


@pytest.mark.parametrize("symbols, a_start", [("Cu2", 2.75), ("Au2", 2.65), ("Pt2", 2.85)])
def test_refined_lattice_matches_the_stress_relaxation(symbols, a_start):
    layer = _buckled(symbols, a_start)
    reference = _stress_relaxed(layer).cell.lengths()[0]
    clamped = _clamped_minimum(layer)
    result = refine_lattice(layer, _attach, _relax)
    assert result.converged and result.relaxed
    a = layer.cell.lengths()[0]
    # within the stopping tolerance of the stress-free lattice
    assert a == pytest.approx(reference, rel=LATTICE_TOL)
    # ... where a scan with the positions held fixed misses it by more than that
    assert abs(clamped / reference - 1) > 2 * LATTICE_TOL
    assert layer.cell.lengths()[1] == pytest.approx(a, rel=1e-9)  # one isotropic mode
    assert np.abs(layer.get_forces()).max() < 1e-3


def _rectangular(symbols, a, aspect):
    """Four-atom rectangular cell of the buckled honeycomb (b = sqrt(3) a when relaxed),
    built with b = aspect * a."""
    hexagonal = honeycomb_monolayer(symbols, a, buckling=0.6)
    a1, a2, a3 = np.array(hexagonal.cell)
    from ase.build import make_supercell

    rect = make_supercell(hexagonal, [[1, 0, 0], [1, 2, 0], [0, 0, 1]])
    cell = np.array(rect.cell)
    assert abs(cell[0] @ cell[1]) < 1e-9  # orthogonal
    cell[1] *= aspect / math.sqrt(3)
    rect.set_cell(cell, scale_atoms=True)
    layer = prepare_monolayer(rect, 12.0)
    _relax(layer, "start")
    return layer


def test_a_rectangular_cell_relaxes_both_lengths_to_the_stress_free_shape():
    layer = _rectangular("Cu2", 2.45, aspect=1.60)
    assert len(strain_modes(layer.cell)) == 2
    reference = _stress_relaxed(layer).cell.lengths()[:2]
    result = refine_lattice(layer, _attach, _relax)
    assert result.converged
    a, b = layer.cell.lengths()[:2]
    assert a == pytest.approx(reference[0], rel=LATTICE_TOL)
    assert b == pytest.approx(reference[1], rel=LATTICE_TOL)
    # the honeycomb's own aspect ratio, sqrt(3), by symmetry of the relaxed layer
    assert b / a == pytest.approx(math.sqrt(3), rel=LATTICE_TOL)
    assert np.degrees(np.arccos(np.dot(*np.array(layer.cell)[:2]) / (a * b))) \
        == pytest.approx(90.0, abs=1e-6)  # the angle is kept


def test_a_lattice_already_at_zero_stress_costs_one_cycle():
    layer = _buckled("Ni2", 2.50)
    relaxed = _stress_relaxed(layer)
    _relax(relaxed, "again")
    before = relaxed.cell.lengths()[0]
    result = refine_lattice(relaxed, _attach, _relax)
    assert (result.cycles, result.energies, result.converged) == (1, 2, True)
    assert relaxed.cell.lengths()[0] == before  # not moved
    assert not np.any(result.strain)


class _Curve:
    """A stand-in calculator: energy a function of the in-plane log-strain of a1 only."""

    def __init__(self, energy):
        from ase.calculators.calculator import Calculator, all_changes

        curve = energy

        class Calc(Calculator):
            implemented_properties = ["energy", "forces"]

            def calculate(self, atoms=None, properties=("energy",),
                          system_changes=all_changes):
                super().calculate(atoms, properties, system_changes)
                u = math.log(atoms.cell.lengths()[0] / 3.0)
                self.results = {"energy": curve(u), "forces": np.zeros((len(atoms), 3))}

        self.Calc = Calc

    def attach(self, atoms, tag, reference):
        atoms.calc = self.Calc()

    def relax(self, atoms, tag):
        atoms.calc = self.Calc()
        return True


def _one_atom_layer(a):
    from ase import Atoms

    return Atoms("C", positions=[[0, 0, 10]], pbc=(True, True, False),
                 cell=[[a, 0, 0], [-a / 2, a * math.sqrt(3) / 2, 0], [0, 0, 20]])


@pytest.mark.parametrize("a", [3.0, 3.0006])
def test_a_maximum_of_the_energy_is_never_taken_for_the_lattice(a):
    curve = _Curve(lambda u: -50 * u ** 2)  # a maximum at a = 3.0
    layer = _one_atom_layer(a)
    layer.calc = curve.Calc()
    result = refine_lattice(layer, curve.attach, curve.relax, max_cycles=3)
    assert not result.converged
    assert abs(math.log(layer.cell.lengths()[0] / 3.0)) > 0.05  # it walked downhill


def test_a_minimum_the_cycles_do_not_reach_is_reported_as_not_converged():
    curve = _Curve(lambda u: 50 * (u - 0.3) ** 2)  # 30 % away, steps of at most 5 %
    layer = _one_atom_layer(3.0)
    layer.calc = curve.Calc()
    result = refine_lattice(layer, curve.attach, curve.relax, max_cycles=3)
    assert not result.converged and result.cycles == 3
    assert result.strain[0] == pytest.approx(0.15)  # three steps of the largest size
    result = refine_lattice(layer, curve.attach, curve.relax)
    assert result.converged  # the rest of the way
    assert math.log(layer.cell.lengths()[0] / 3.0) == pytest.approx(0.3, abs=LATTICE_TOL)


def test_strain_modes_follow_the_cell_lengths():
    hexagonal = prepare_monolayer(honeycomb_monolayer("BN", 2.5), 12.0)
    assert strain_modes(hexagonal.cell) == [(1.0, 1.0)]
    cell = np.diag([3.3, 4.6, 20.0])  # a puckered, phosphorene-like cell
    assert strain_modes(cell) == [(1.0, 0.0), (0.0, 1.0)]


@pytest.mark.parametrize("kwargs", [{"step": 0}, {"step": 0.3}, {"tol": 0},
                                    {"max_cycles": 0}, {"max_step": -0.1}])
def test_bad_refinement_parameters_are_refused(kwargs):
    layer = prepare_monolayer(honeycomb_monolayer("Cu2", 2.5, buckling=0.6), 12.0)
    layer.calc = EMT()
    with pytest.raises(InputError, match="bad lattice refinement parameters"):
        refine_lattice(layer, _attach, _relax, **kwargs)
