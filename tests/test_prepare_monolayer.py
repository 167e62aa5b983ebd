"""Re-orienting a monolayer for the labeller keeps every interatomic distance."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from ase.build import mx2

from prescreen.physics.dft import prepare_monolayer


@pytest.mark.parametrize("a3", [(0.0, 0.0, 21.3), (1.5, 0.7, 21.3), (-2.0, 3.1, 18.0)])
def test_tilted_third_vector_keeps_distances(a3):
    # 2H-MoS2 built by ASE; a tilted a3 describes the same layer (same in-plane lattice),
    # so all distances (ASE's minimum-image convention) must be unchanged.
    layer = mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=9.0)
    before = np.sort(layer.get_all_distances(mic=True).ravel())
    tilted = layer.copy()
    cell = np.array(tilted.cell)
    cell[2] = a3
    tilted.set_cell(cell, scale_atoms=False)
    out = prepare_monolayer(tilted, vacuum_A=15.0)
    assert np.allclose(out.cell[2], [0.0, 0.0, out.cell[2, 2]])
    out.pbc = True
    after = np.sort(out.get_all_distances(mic=True).ravel())
    np.testing.assert_allclose(after, before, atol=1e-9)


def test_a_layer_that_breaks_in_the_pre_relaxation_skips_the_lattice_scan(monkeypatch):
    # The relaxation's own steps with a stand-in force field (ASE's Lennard-Jones), so no
    # DFT is needed: only the control flow is under test, not a geometry.
    from ase.calculators.lj import LennardJones

    from prescreen.physics import dft

    made = []

    def stand_in(settings, kmesh, txt, magnetic, **extra):
        made.append(str(txt))
        return LennardJones(sigma=1.0, epsilon=0.01, rc=3.0)

    monkeypatch.setattr(dft, "_gpaw_calculator", stand_in)
    layer = mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=9.0)
    with pytest.raises(dft.LayerBroke, match="broke during the pre-relaxation: gone") as info:
        dft.relax_monolayer(layer, check_layer=lambda atoms: "gone", steps=2)
    assert info.value.reason == "gone" and len(info.value.structure) == 3
    assert len(made) == 1 and made[0].endswith("relax-start.txt")  # no scan, no final step
    made.clear()
    relaxed, _, _ = dft.relax_monolayer(layer, check_layer=lambda atoms: "", steps=2)
    stages = [Path(name).stem.removeprefix("relax-") for name in made]
    final = stages.index("final")  # the scan, positions relaxed there, then the refinement
    assert stages[0] == "start" and all(s.startswith("scale") for s in stages[1:final])
    assert stages[final + 1:] and all(s.startswith("lattice") for s in stages[final + 1:])


@pytest.mark.parametrize("axis", [0, 1])
def test_vacuum_along_a1_or_a2_is_turned_to_a3_keeping_distances(axis):
    # the same 2H-MoS2 layer with its vacuum along another lattice vector: the monolayer
    # check accepts it, so the labeller must too (distances by ASE's minimum image)
    layer = mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=9.0)
    order = [(axis + 1) % 3, (axis + 2) % 3, axis]
    inverse = np.argsort(order)
    from ase import Atoms

    turned = Atoms(layer.numbers, cell=np.asarray(layer.cell)[inverse],
                   scaled_positions=layer.get_scaled_positions()[:, inverse], pbc=True)
    out = prepare_monolayer(turned, vacuum_A=15.0)
    ref = prepare_monolayer(layer, vacuum_A=15.0)
    np.testing.assert_allclose(out.cell.cellpar(), ref.cell.cellpar(), atol=1e-9)
    for a in (out, ref):
        a.pbc = True
    np.testing.assert_allclose(np.sort(out.get_all_distances(mic=True).ravel()),
                               np.sort(ref.get_all_distances(mic=True).ravel()), atol=1e-9)
