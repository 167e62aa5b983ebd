"""The universal-potential start of the DFT relaxation (prescreen.physics.prerelax).

CHGNet is an optional extra, so these tests drive the same code with ASE's EMT
calculator (part of ASE) on a buckled copper honeycomb, and check the symmetry with
spglib through pymatgen's SpacegroupAnalyzer.
"""

from __future__ import annotations

import importlib.metadata

import numpy as np
import pytest
from ase.calculators.calculator import Calculator, all_changes
from ase.calculators.emt import EMT
from ase.filters import FrechetCellFilter
from ase.optimize import BFGS, FIRE
from pymatgen.core import Lattice, Structure
from pymatgen.io.ase import AseAtomsAdaptor
from pymatgen.symmetry.analyzer import SpacegroupAnalyzer

from prescreen.physics import prerelax
from prescreen.physics.prerelax import MissingPotential, prerelax_monolayer
from prescreen.prototypes import check_intact_monolayer

MASK = [1, 1, 0, 0, 0, 1]  # in-plane strain only, as the DFT relaxation


def _buckled_cu(a: float = 2.6, buckling: float = 1.0, c: float = 20.0) -> Structure:
    """A buckled honeycomb, space group P-3m1 (164) by construction."""
    return Structure(Lattice.hexagonal(a, c), ["Cu", "Cu"],
                     [[1 / 3, 2 / 3, 0.5 + buckling / 2 / c],
                      [2 / 3, 1 / 3, 0.5 - buckling / 2 / c]])


def _space_group(structure: Structure) -> int:
    return SpacegroupAnalyzer(structure, symprec=1e-5).get_space_group_number()


class _NoisyEMT(Calculator):
    """EMT whose forces carry a seeded random error of ``sigma`` eV/A, as a potential
    evaluated in single precision has."""

    implemented_properties = ["energy", "forces", "stress"]

    def __init__(self, sigma: float, seed: int = 0) -> None:
        super().__init__()
        self.sigma, self.rng, self.emt = sigma, np.random.default_rng(seed), EMT()

    def calculate(self, atoms=None, properties=("energy",), system_changes=all_changes):
        super().calculate(atoms, properties, system_changes)
        a = self.atoms.copy()
        a.calc = self.emt
        self.results = {"energy": a.get_potential_energy(), "stress": a.get_stress(),
                        "forces": a.get_forces()
                        + self.rng.normal(0, self.sigma, (len(a), 3))}


def _check(structure: Structure) -> str:
    return check_intact_monolayer(structure)[1]


def test_start_keeps_the_space_group_under_noisy_forces():
    start = _buckled_cu()
    assert _space_group(start) == 164
    got = prerelax_monolayer(start, _NoisyEMT(1e-3), check_layer=_check)
    assert got.used, got.note
    assert _space_group(got.structure) == 164
    # without FixSymmetry the same noise breaks it: the constraint is what keeps it
    atoms = AseAtomsAdaptor.get_atoms(start)
    atoms.calc = _NoisyEMT(1e-3)
    FIRE(FrechetCellFilter(atoms, mask=MASK), logfile=None).run(fmax=0.05, steps=300)
    assert _space_group(AseAtomsAdaptor.get_structure(atoms)) != 164


def test_start_reaches_the_relaxation_of_ase_without_constraints():
    """With exact forces the symmetric start is ASE's own relaxation of the cell and
    positions (BFGS to 1e-3 eV/A, no constraint): the constraint removes nothing the
    relaxation needed."""
    start = _buckled_cu(a=2.45, buckling=0.6)
    got = prerelax_monolayer(start, EMT(), fmax=1e-3, steps=2000, check_layer=_check)
    assert got.used, got.note
    ref = AseAtomsAdaptor.get_atoms(start)
    ref.calc = EMT()
    BFGS(FrechetCellFilter(ref, mask=MASK), logfile=None).run(fmax=1e-3, steps=2000)
    np.testing.assert_allclose(got.structure.lattice.abc[:2], ref.cell.lengths()[:2],
                               rtol=1e-3)
    np.testing.assert_allclose(got.strain, np.log(ref.cell.lengths()[:2] / 2.45), atol=1e-3)
    assert got.converged and got.residual < 1e-3
    dz = np.ptp(got.structure.cart_coords[:, 2])
    assert dz == pytest.approx(np.ptp(ref.positions[:, 2]), abs=5e-3)


def test_a_start_that_falls_apart_is_not_used():
    start = _buckled_cu()
    got = prerelax_monolayer(start, EMT(), name="EMT", check_layer=lambda s: "fell apart here")
    assert not got.used and got.refusal == "fell_apart"
    assert got.structure is start
    assert got.note.startswith("generated; not EMT (FixSymmetry") and "fell apart here" in got.note
    assert got.record_fields()["start"] == got.note


def test_a_start_strained_beyond_the_limit_is_not_used():
    start = _buckled_cu()
    got = prerelax_monolayer(start, EMT(), max_strain=0.01, check_layer=_check)
    assert not got.used and got.structure is start and got.refusal == "strain"
    assert "beyond 0.01" in got.note
    assert abs(got.strain[0]) > 0.01  # the measured strain is still recorded
    fields = got.record_fields()
    assert set(fields) == {"start", "start_strain", "start_steps", "start_s"}
    assert fields["start_steps"] > 0


def test_a_start_out_of_steps_says_so_with_the_force_left():
    """The residual is the largest force FIRE saw, on the atoms and on the in-plane cell:
    at least the largest atomic force that EMT itself gives at the final geometry."""
    start = _buckled_cu(a=2.45, buckling=0.6)
    got = prerelax_monolayer(start, EMT(), steps=2, check_layer=_check)
    assert got.used and not got.converged and got.steps == 2
    assert "not converged in 2 steps" in got.note
    assert got.residual > 0.05
    atoms = AseAtomsAdaptor.get_atoms(got.structure)
    atoms.calc = EMT()
    atomic = float(np.linalg.norm(atoms.get_forces(), axis=1).max())
    assert got.residual >= atomic - 1e-9  # the cell's force can only add


def test_missing_potential_names_the_extra(monkeypatch):
    def missing(name: str) -> str:
        raise importlib.metadata.PackageNotFoundError(name)

    monkeypatch.setattr(importlib.metadata, "version", missing)
    with pytest.raises(MissingPotential, match=r"pip install -e '\.\[uip\]'"):
        prerelax.potential_calculator()
