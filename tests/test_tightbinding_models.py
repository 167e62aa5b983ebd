"""Reference tight-binding models against their published phase diagrams.

Spillage (Liu and Vanderbilt, PRB 90, 125133 (2014)) and the Wilson-loop Z2 invariant
(Yu et al., PRB 84, 075119 (2011)) are computed independently and must both reproduce
the published phases, and agree with each other, with the common-practice threshold 0.5.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from prescreen.errors import InputError, PrescreenWarning
from prescreen.physics.spillage import SPILLAGE_THRESHOLD
from prescreen.physics.tightbinding import (
    KANE_MELE_BOUNDARY,
    KaneMele,
    SPSquare,
    bhz_hamiltonian,
    kmesh,
    soc_spillage,
)
from prescreen.physics.z2 import chern_number, z2_invariant

LAMBDA_SO = 0.06  # t; the value used in Kane and Mele, PRL 95, 146802 (2005), Fig. 1 (from memory)
MESH = kmesh(12)  # Gamma-centred, 12 divisible by 3: K = (1/3, 1/3) is on the mesh
K_POINTS = ([1 / 3, 1 / 3, 0.0], [-1 / 3, -1 / 3, 0.0])
TIME_REVERSAL = np.kron(np.eye(3), np.array([[0, 1], [-1, 0]]))  # i sigma_y per orbital


def _spin_up_block(hamiltonian):
    return lambda k: hamiltonian(k)[:, ::2, ::2]


def _at_k(result, k) -> bool:
    return bool(np.allclose(result.k_max, k))


# ---------------------------------------------------------------- model sanity checks


def test_graphene_limit() -> None:
    # Wallace, Phys. Rev. 71, 622 (1947): nearest-neighbour graphene has Dirac points
    # at K and K' (zero energy) and bands +-3t at Gamma.
    h = KaneMele(lambda_so=0.0).hamiltonian(np.array([[0, 0, 0], *K_POINTS]))
    e = np.linalg.eigvalsh(h)
    np.testing.assert_allclose(e[0], [-3, -3, 3, 3], atol=1e-12)
    np.testing.assert_allclose(e[1:], 0.0, atol=1e-12)


@pytest.mark.parametrize("n", [3, 6, 9, 12])
def test_meshes_divisible_by_three_contain_k(n: int) -> None:
    mesh = kmesh(n)
    assert len(mesh) == n * n
    for k in K_POINTS:
        assert np.any(np.all(np.isclose(mesh, k), axis=1))


@pytest.mark.parametrize(
    "model",
    [KaneMele(lambda_so=0.06, lambda_r=0.05, lambda_v=0.1), SPSquare(lambda_so=1.0)],
    ids=["kane-mele-rashba", "s-p-square"],
)
def test_hamiltonians_are_hermitian_periodic_and_time_reversal_symmetric(model) -> None:
    k = np.random.default_rng(0).uniform(-0.5, 0.5, size=(7, 3))
    h = model.hamiltonian(k)
    np.testing.assert_allclose(h, h.conj().transpose(0, 2, 1), atol=1e-13)
    np.testing.assert_allclose(model.hamiltonian(k + [1, -2, 0]), h, atol=1e-12)
    nb = h.shape[1]
    theta = TIME_REVERSAL[:nb, :nb]
    # Kramers: Theta H(k)* Theta^-1 = H(-k) with Theta = i sigma_y K
    np.testing.assert_allclose(theta @ h.conj() @ theta.T, model.hamiltonian(-k), atol=1e-12)


@pytest.mark.parametrize("lambda_v", [0.05, 0.1, 0.2, 0.4, 1.0])
def test_kane_mele_gap_at_k(lambda_v: float) -> None:
    # Kane and Mele, PRL 95, 226801 (2005) (from memory): without Rashba the gap at K is
    # 2 |3 sqrt(3) lambda_SO - lambda_v|
    e = np.linalg.eigvalsh(KaneMele(lambda_so=LAMBDA_SO, lambda_v=lambda_v)
                           .hamiltonian(np.array([K_POINTS[0]])))[0]
    assert e[2] - e[1] == pytest.approx(2 * abs(KANE_MELE_BOUNDARY * LAMBDA_SO - lambda_v))


# ------------------------------------------------------- Kane–Mele without Rashba


@pytest.mark.parametrize("ratio", [0.2, 1.0, 3.0, 4.5, 5.0, 5.15])
def test_kane_mele_topological_side(ratio: float) -> None:
    # Kane and Mele, PRL 95, 226801 (2005): topological exactly when
    # |lambda_v| < 3 sqrt(3) lambda_SO (ratio = lambda_v / lambda_SO < 5.196)
    model = KaneMele(lambda_so=LAMBDA_SO, lambda_v=ratio * LAMBDA_SO)
    result = soc_spillage(model, MESH)
    # one spin inverts per valley: spillage 1 at K (and K')
    assert result.max == pytest.approx(1.0, abs=1e-9)
    assert any(_at_k(result, k) for k in K_POINTS)
    assert z2_invariant(model.hamiltonian, 2).z2 == 1
    assert abs(chern_number(_spin_up_block(model.hamiltonian), 1)) == 1


@pytest.mark.parametrize("ratio", [5.25, 5.5, 7.0, 10.0, 1.0 / LAMBDA_SO])
def test_kane_mele_trivial_side(ratio: float) -> None:
    # same source: trivial for |lambda_v| > 3 sqrt(3) lambda_SO; the last point is
    # lambda_v = t
    model = KaneMele(lambda_so=LAMBDA_SO, lambda_v=ratio * LAMBDA_SO)
    result = soc_spillage(model, MESH)
    assert result.max < SPILLAGE_THRESHOLD
    assert z2_invariant(model.hamiltonian, 2).z2 == 0
    assert chern_number(_spin_up_block(model.hamiltonian), 1) == 0


def test_negative_staggered_potential_is_symmetric() -> None:
    # the criterion depends on |lambda_v| (Kane and Mele, PRL 95, 226801 (2005))
    for lv, z2 in ((-0.2, 1), (-0.4, 0)):
        model = KaneMele(lambda_so=LAMBDA_SO, lambda_v=lv)
        assert (soc_spillage(model, MESH).max >= SPILLAGE_THRESHOLD) == bool(z2)
        assert z2_invariant(model.hamiltonian, 2).z2 == z2


def test_z2_refuses_the_gapless_boundary() -> None:
    model = KaneMele(lambda_so=LAMBDA_SO, lambda_v=KANE_MELE_BOUNDARY * LAMBDA_SO)
    with pytest.raises(InputError, match="bands touch"):
        z2_invariant(model.hamiltonian, 2)


def test_gapless_reference_warns() -> None:
    # at lambda_v = 0 the reference without spin-orbit coupling is graphene, gapless at K
    with pytest.warns(PrescreenWarning, match="gapless"):
        soc_spillage(KaneMele(lambda_so=LAMBDA_SO), MESH)


# ---------------------------------------------------------- Kane–Mele with Rashba


@pytest.mark.parametrize(
    ("lambda_v", "lambda_r", "z2"),
    [
        # Kane and Mele, PRL 95, 146802 (2005), Fig. 1 (from memory): with
        # lambda_SO = 0.06 t and lambda_R = 0.05 t, lambda_v = 0.1 t is a quantum spin
        # Hall insulator and lambda_v = 0.4 t an ordinary insulator.
        (0.1, 0.05, 1),
        (0.4, 0.05, 0),
        # same figure (from memory): at lambda_v = 0 the QSH phase survives up to
        # lambda_R = 2 sqrt(3) lambda_SO
        (0.0, 0.9 * 2 * np.sqrt(3) * LAMBDA_SO, 1),
    ],
)
def test_kane_mele_rashba_published_points(lambda_v: float, lambda_r: float, z2: int) -> None:
    model = KaneMele(lambda_so=LAMBDA_SO, lambda_r=lambda_r, lambda_v=lambda_v)
    assert z2_invariant(model.hamiltonian, 2).z2 == z2
    if lambda_v > 0:  # the reference is gapless at lambda_v = 0
        assert (soc_spillage(model, MESH).max >= SPILLAGE_THRESHOLD) == bool(z2)


@pytest.mark.parametrize("factor", [1.1, 1.3])
def test_kane_mele_gap_closes_above_the_rashba_limit(factor: float) -> None:
    # Kane and Mele, PRL 95, 226801 (2005) and Fig. 1 of PRL 95, 146802 (2005) (both from
    # memory): at lambda_v = 0 the gap closes
    # for lambda_R > 2 sqrt(3) lambda_SO (at K, which the Wilson loops sample)
    model = KaneMele(lambda_so=LAMBDA_SO, lambda_r=factor * 2 * np.sqrt(3) * LAMBDA_SO)
    with pytest.raises(InputError, match="bands touch"):
        z2_invariant(model.hamiltonian, 2)


@pytest.mark.parametrize("lambda_r", [0.03, 0.1, 0.15, 0.2])
@pytest.mark.parametrize("lambda_v", [0.05, 0.15, 0.25, 0.35])
def test_spillage_agrees_with_z2_with_rashba(lambda_v: float, lambda_r: float) -> None:
    # independent methods on the Kane–Mele (lambda_v, lambda_R) phase diagram
    model = KaneMele(lambda_so=LAMBDA_SO, lambda_r=lambda_r, lambda_v=lambda_v)
    z2 = z2_invariant(model.hamiltonian, 2).z2
    spill = soc_spillage(model, MESH)
    assert (spill.max >= SPILLAGE_THRESHOLD) == bool(z2)
    # keeping the Rashba term in the reference classifies the same way
    keep = soc_spillage(model, MESH, reference=dataclasses.replace(model, lambda_so=0.0))
    assert (keep.max >= SPILLAGE_THRESHOLD) == bool(z2)


# -------------------------------------------------------- s, p_x, p_y square lattice


@pytest.mark.parametrize("ratio", [0.0, 0.5, 0.9, 1.1, 1.5, 2.5])
def test_sp_square_inversion_at_gamma(ratio: float) -> None:
    # Bernevig, Hughes and Zhang, Science 314, 1757 (2006): the insulator is quantum spin
    # Hall once the s-like and the j_z = +-3/2 p-like Kramers pairs are inverted at
    # Gamma, i.e. lambda_SO / 2 > E_s(Gamma) - E_p(Gamma) here (ratio > 1).
    base = SPSquare()
    model = dataclasses.replace(base, lambda_so=ratio * base.critical_lambda)
    result = soc_spillage(model, kmesh(8))
    z2 = z2_invariant(model.hamiltonian, 4).z2
    spin_chern = chern_number(_spin_up_block(model.hamiltonian), 2)
    assert z2 == int(ratio > 1)
    assert abs(spin_chern) % 2 == z2
    if ratio > 1:
        # one Kramers pair inverted at the TRIM: two electrons spill
        assert result.max == pytest.approx(2.0, abs=1e-9)
        assert _at_k(result, [0, 0, 0])
    else:
        assert result.max < SPILLAGE_THRESHOLD


# -------------------------------------------------------------------- BHZ lattice


@pytest.mark.parametrize(
    ("m_over_b", "z2"),
    [
        (-1.0, 0),  # BHZ, Science 314, 1757 (2006): normal order (M/B < 0) is trivial
        (0.5, 1),  # brief/BHZ lattice form: topological for 0 < M/B < 4
        (2.0, 1),
        (3.5, 1),
        (6.0, 1),  # derived here from d_z at X and M: inverted at M only -> Z2 = 1
        (9.0, 0),  # derived here: d_z has one sign over the whole zone for M/B > 8
    ],
)
def test_bhz_lattice_phase_diagram(m_over_b: float, z2: int) -> None:
    def h(k):
        return bhz_hamiltonian(k, a=1.0, b=1.0, m=m_over_b)

    assert z2_invariant(h, 2).z2 == z2
    assert abs(chern_number(lambda k: h(k)[:, :2, :2], 1)) == z2
