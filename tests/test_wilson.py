"""Z2 from DFT Wilson loops (prescreen.physics.wilson).

Reference facts:

* Kane and Mele, Phys. Rev. Lett. 95, 146802 (2005): without Rashba coupling the model
  is a quantum spin Hall insulator (Z2 = 1) for a staggered potential
  lambda_v < 3 sqrt(3) lambda_so and trivial above; a small Rashba term does not change
  the phase away from the boundary (their Fig. 1 phase diagram). The staggered potential
  breaks inversion, the case this module exists for.
* In the atomic limit (no hopping) a Wannier function is the occupied orbital itself, so
  its centre is the site (textbook: Marzari et al., Rev. Mod. Phys. 84, 1419 (2012)).
* Z2 cannot change under a perturbation that keeps the bulk gap open (Kane and Mele
  2005), so a far spectator molecule on one side of a layer leaves it unchanged.
* Buckled Bi honeycomb: Z2 = 1 (Murakami, Phys. Rev. Lett. 97, 236805 (2006); from
  memory). 2H-MoS2 monolayer: a trivial semiconductor, Z2 = 0 (from memory).

Geometries as in tests/test_dft.py and tests/test_parity.py (from memory).
"""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atom
from ase.build import mx2

from prescreen.errors import InputError, PrescreenError
from prescreen.physics.dft import LabelSettings, honeycomb_monolayer, prepare_monolayer
from prescreen.physics.tightbinding import KaneMele
from prescreen.physics.wilson import loop_centres
from prescreen.physics.z2 import z2_from_flow, z2_invariant

#: Kane-Mele orbitals (A up, A down, B up, B down): A at (1/3, 2/3), B at (2/3, 1/3).
KM_TAU = np.array([[1 / 3, 2 / 3, 0.0], [2 / 3, 1 / 3, 0.0]])


def km_centres(model: KaneMele, nk1: int = 24):
    """The module's loop on a Kane-Mele model: its eigenvectors are LCAO coefficients
    in Bloch sums of GPAW's convention (exp(i k.R), no position phase), with S = 1."""
    def centres(k2):
        out, worst = [], 1.0
        for y in np.atleast_1d(k2):
            kpts = np.column_stack([np.arange(nk1) / nk1, np.full(nk1, y), np.zeros(nk1)])
            _, v = np.linalg.eigh(model.hamiltonian(kpts))
            occ = v[:, :, :model.n_occupied]  # (nk1, 4, n_occ)
            C = occ.transpose(0, 2, 1).reshape(nk1, model.n_occupied, 2, 2)  # [k, m, M, s]
            S = np.broadcast_to(np.eye(2), (nk1, 2, 2))
            w, link = loop_centres(C, S, KM_TAU, nk1)
            worst = min(worst, link)
            out.append(w)
        return np.array(out), worst
    return centres


@pytest.mark.parametrize(("lambda_v", "lambda_r", "z2"), [
    (0.1, 0.0, 1),   # below 3 sqrt(3) lambda_so = 0.31: quantum spin Hall
    (0.1, 0.05, 1),  # with Rashba coupling (no S_z conservation)
    (0.5, 0.0, 0),   # above: trivial
    (0.5, 0.05, 0),
])
def test_kane_mele_phases_from_lcao_style_loops(lambda_v, lambda_r, z2):
    model = KaneMele(lambda_so=0.06, lambda_v=lambda_v, lambda_r=lambda_r)
    flow = z2_from_flow(km_centres(model), n_lines=13, max_lines=200)
    assert flow.z2 == z2
    # the same answer as the model-Hamiltonian route, which ignores the positions
    assert z2_invariant(model.hamiltonian, model.n_occupied).z2 == z2


def test_atomic_limit_centres_sit_on_the_occupied_site():
    # B (lambda_v xi = -1) is lower; with tiny hopping both occupied states live on B,
    # whose a1 coordinate is 2/3: the position phases put the centres there
    model = KaneMele(t=0.02, lambda_so=0.0, lambda_v=1.0)
    wcc, link = km_centres(model)(np.array([0.0, 0.25, 0.5]))
    assert np.allclose(wcc, 2 / 3, atol=0.01)
    assert link > 0.99


def test_a_closed_gap_ends_the_refinement_instead_of_looping():
    # exactly at the Kane-Mele phase boundary lambda_v = 3 sqrt(3) lambda_so the gap
    # closes at K (Kane and Mele 2005): bisection must stop with an error, not run forever
    import time

    model = KaneMele(lambda_so=0.06, lambda_v=3 * np.sqrt(3) * 0.06)
    t0 = time.perf_counter()
    with pytest.raises(PrescreenError, match="not resolved"):
        z2_from_flow(km_centres(model), n_lines=9, max_lines=65)
    assert time.perf_counter() - t0 < 30


def test_an_odd_number_of_centres_is_refused():
    with pytest.raises(InputError, match="Kramers pairs"):
        z2_from_flow(lambda k2: (np.zeros((len(k2), 3)), 1.0), n_lines=3)


def test_an_unresolvable_flow_is_refused():
    def jumpy(k2):  # centres that jump everywhere: no line ever agrees with its neighbour
        rng = np.random.default_rng(int(1e6 * float(np.sum(k2))) % 2**32)
        return np.sort(rng.random((len(k2), 4)), axis=1), 1.0

    with pytest.raises(PrescreenError, match="not resolved"):
        z2_from_flow(jumpy, n_lines=5, max_lines=20)


def test_magnetic_settings_and_bad_loop_sizes_are_refused():
    from prescreen.physics.wilson import z2_from_wilson_loops

    layer = honeycomb_monolayer("Bi2", 4.33, 1.73)
    with pytest.raises(InputError, match="time-reversal"):
        z2_from_wilson_loops(layer, LabelSettings(spinpol=True))
    with pytest.raises(InputError, match="too few Wilson loops"):
        z2_from_wilson_loops(layer, nk1=2)


def test_auto_takes_parities_only_with_an_inversion_centre():
    from prescreen.invariants import choose_method

    one_t = mx2("MoS2", "1T", a=3.18, thickness=3.0, vacuum=8.0)
    two_h = mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=8.0)
    assert choose_method(one_t) == "parity"  # D3d has inversion
    assert choose_method(two_h) == "wilson"  # D3h has none
    assert choose_method(one_t, "wilson") == "wilson"
    with pytest.raises(InputError, match="unknown Z2 method"):
        choose_method(one_t, "chern")


# ----------------------------------------------------------------------------- DFT

MESH = LabelSettings(kpts=(6, 6, 1))


@pytest.mark.dft
def test_buckled_bismuth_is_topological():
    from prescreen.physics.wilson import MIN_LINK, z2_from_wilson_loops

    r = z2_from_wilson_loops(honeycomb_monolayer("Bi2", 4.33, 1.73), MESH, id="Bi")
    assert r.z2 == 1  # Murakami 2006
    assert r.direct_gap_soc_eV > 0.1
    assert r.min_link >= MIN_LINK and r.n_occupied % 2 == 0
    assert r.k2[0] == 0.0 and r.k2[-1] == 0.5


@pytest.mark.dft
def test_bismuth_with_a_spectator_molecule_on_one_side_keeps_z2():
    from prescreen.invariants import choose_method
    from prescreen.physics.wilson import z2_from_wilson_loops

    atoms = prepare_monolayer(honeycomb_monolayer("Bi2", 4.33, 1.73), 12.0)
    top = atoms.positions[:, 2].max()
    # a vertical H2 molecule 4 A above one face: no bond, no inversion centre
    atoms.append(Atom("H", (0.0, 0.0, top + 4.0)))
    atoms.append(Atom("H", (0.0, 0.0, top + 4.74)))
    assert choose_method(atoms) == "wilson"
    assert z2_from_wilson_loops(atoms, MESH, id="Bi+H2").z2 == 1  # gap stays open


@pytest.mark.dft
def test_trigonal_prismatic_mos2_is_trivial():
    from prescreen.physics.wilson import z2_from_wilson_loops

    r = z2_from_wilson_loops(mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=8.0), MESH)
    assert r.z2 == 0
    assert 1.0 < r.direct_gap_soc_eV < 2.5  # a direct gap near K of about 1.6-1.7 eV


def test_the_flow_plot_shows_every_centre_and_the_tracked_gap():
    import matplotlib

    matplotlib.use("Agg")
    from prescreen.physics.wilson import WilsonZ2, plot_flow

    flow = z2_from_flow(km_centres(KaneMele(lambda_so=0.06, lambda_v=0.1)), n_lines=13)
    result = WilsonZ2(id="km", formula="model", z2=flow.z2, k2=tuple(flow.k2),
                      wcc=tuple(map(tuple, flow.wcc)), gap_centres=tuple(flow.gap_centres),
                      direct_gap_soc_eV=flow.min_direct_gap, min_link=1.0, n_occupied=2,
                      nk1=24, kmesh=(1, 1, 1))
    ax = plot_flow(result)
    points = sum(len(line.get_xdata()) for line in ax.lines[:-1])  # dots per loop, then gaps
    assert points == flow.wcc.size
    assert list(ax.lines[-1].get_ydata()) == list(flow.gap_centres)
    assert "Z2 = 1" in ax.get_title() and "Wannier" in ax.get_ylabel()


@pytest.mark.dft
def test_point_orbital_links_follow_gpaws_own_overlaps(tmp_path):
    # The reference is GPAW itself: its LCAO states put on the real-space grid, with the
    # PAW corrections, give the exact <u_k|u_k+b>. The point-orbital links must be close
    # to those, closer than with the opposite phase or the transposed overlap (the two
    # convention mistakes a sign or an index swap would make), and GPAW's Bloch sums at
    # k1 = 1 must equal those at k1 = 0 (the loop closure). A small hBN cell with one atom
    # given outside the unit cell checks the wrapping too.
    from ase import Atoms
    from gpaw import GPAW, FermiDirac

    from prescreen.physics.wilson import _orbital_centres, point_orbital_link

    a = 2.51
    atoms = Atoms("BN", cell=[[a, 0, 0], [-a / 2, a * np.sqrt(3) / 2, 0], [0, 0, 9.0]],
                  pbc=[True, True, False])
    atoms.set_scaled_positions([[0.1, 0.2, 0.5], [-0.2333, 0.5333, 0.5]])
    calc = GPAW(mode="lcao", basis="sz(dzp)", xc="LDA", h=0.22,
                kpts={"size": (3, 3, 1), "gamma": True}, nbands="nao",
                occupations=FermiDirac(0.01), txt=str(tmp_path / "scf.txt"))
    atoms.calc = calc
    atoms.get_potential_energy()
    nk1, nocc = 8, 4
    kpts = np.array([[j / nk1, 0.17, 0.0] for j in range(nk1 + 1)])  # k1 = 0 .. 1
    nscf = calc.fixed_density(kpts=kpts, symmetry="off", txt=str(tmp_path / "nscf.txt"))
    dft = nscf.dft
    tau = _orbital_centres(nscf)
    wfs = list(dft.ibzwfs)
    assert np.abs(wfs[-1].S_MM.data - wfs[0].S_MM.data).max() < 1e-10  # closure

    grid = dft.ibzwfs.grid
    psi, proj = [], []
    for w in wfs:
        g = w.to_uniform_grid_wave_functions(grid, w.basis)
        psi.append(g.psit_nX.data[:nocc].reshape(nocc, -1).copy())
        proj.append({at: g.P_ani[at][:nocc].copy() for at in g.P_ani.keys()})
    dv = abs(np.linalg.det(grid.cell_cv)) / np.prod(grid.size_c)
    r = grid.xyz().reshape(-1, 3)
    b = np.array([1 / nk1, 0.0, 0.0]) @ (2 * np.pi * np.linalg.inv(grid.cell_cv).T)
    pos = dft.relpos_ac @ grid.cell_cv

    def exact(i, j):
        m = (psi[i].conj() * np.exp(-1j * r @ b)[None, :]) @ psi[j].T * dv
        for at in proj[i]:
            m += (np.exp(-1j * pos[at] @ b) * proj[i][at].conj() @ dft.setups[at].dO_ii
                  @ proj[j][at].T)
        return m

    def coeffs(i):
        return wfs[i].C_nM.data[:nocc, :, None]

    for i in (0, 3):
        ref = exact(i, i + 1)
        Sa, Sb = wfs[i].S_MM.data, wfs[i + 1].S_MM.data
        ours = point_orbital_link(coeffs(i), coeffs(i + 1), Sa, Sb, tau[:, 0] / nk1)
        flipped = point_orbital_link(coeffs(i), coeffs(i + 1), Sa, Sb, -tau[:, 0] / nk1)
        swapped = point_orbital_link(coeffs(i), coeffs(i + 1), Sa.T, Sb.T, tau[:, 0] / nk1)
        err = np.abs(ours - ref).max()
        assert err < 0.3  # dropped intra-atomic dipoles, measured about 0.17-0.19
        assert err < 0.5 * np.abs(flipped - ref).max()
        assert err < 0.5 * np.abs(swapped - ref).max()


@pytest.mark.dft
@pytest.mark.parametrize("route", ["wilson", "parity"])
def test_an_odd_electron_count_is_reported_as_touching_bands(route):
    # With time-reversal symmetry every state at a TRIM has a Kramers partner of the same
    # energy (Kramers' theorem), so with one electron the occupied state meets an empty one
    # there and no Z2 is defined. A square net of hydrogen atoms: one electron per cell
    # (and an inversion centre, so both routes apply).
    from ase import Atoms

    from prescreen.errors import NoDirectGap
    from prescreen.physics.parity import z2_from_parities
    from prescreen.physics.wilson import z2_from_wilson_loops

    compute = z2_from_wilson_loops if route == "wilson" else z2_from_parities
    layer = Atoms("H", positions=[[0, 0, 7.5]], cell=[[2.0, 0, 0], [0, 2.0, 0], [0, 0, 15]],
                  pbc=True)
    with pytest.raises(NoDirectGap, match="1 valence electrons, an odd number") as err:
        compute(layer, LabelSettings(kpts=(2, 2, 1)), id="H-square")
    assert err.value.gap_eV == 0.0 and err.value.odd_count
