"""Reference tight-binding models with published topological phase diagrams.

These small models are the ground truth for the spillage engine
(:mod:`prescreen.physics.spillage`) and the Z2 invariant (:mod:`prescreen.physics.z2`):

* :class:`KaneMele` — graphene with intrinsic spin-orbit coupling, Rashba coupling and a
  staggered sublattice potential (Kane and Mele, Phys. Rev. Lett. 95, 226801 (2005) and
  95, 146802 (2005)). Without Rashba coupling it is a quantum spin Hall insulator exactly
  when |lambda_v| < 3*sqrt(3)*lambda_SO; spin-orbit coupling then inverts one spin per
  valley at K and K'.
* :class:`SPSquare` — s, p_x and p_y orbitals on a square lattice (Slater–Koster
  hoppings) with on-site spin-orbit coupling lambda L.S in the p shell. Spin-orbit
  coupling splits the p_x/p_y pair at Gamma and, once strong enough, pushes one Kramers
  pair above the s pair: the band inversion of Bernevig, Hughes and Zhang, Science 314,
  1757 (2006), which makes the insulator a quantum spin Hall insulator.
* :func:`bhz_hamiltonian` — the BHZ lattice model itself (no spin-orbit-free reference),
  used to check the Z2 code against its published phase diagram.

All Hamiltonians are built in the periodic gauge (Bloch sums with the phase of the cell,
not of the orbital position), so ``H(k + G) = H(k)``; k points are fractional (reduced)
coordinates of the reciprocal lattice vectors, shape (nk, 3) (the third component is
ignored: the models are two-dimensional). The basis is ordered orbital-major, spin-minor:
index ``2 * orbital + spin`` with spin 0 = up, 1 = down along z.

Energies are in units of the model's own energy scale (t for Kane–Mele); only ratios
matter.
"""

from __future__ import annotations

import dataclasses
import warnings
from dataclasses import dataclass
from functools import cached_property
from typing import Protocol

import numpy as np

from prescreen.errors import InputError, PrescreenWarning
from prescreen.physics.spillage import SpillageResult, spillage_from_eigenvectors

__all__ = [
    "DEGENERACY_TOL",
    "KANE_MELE_BOUNDARY",
    "Model",
    "KaneMele",
    "SPSquare",
    "bhz_hamiltonian",
    "kmesh",
    "soc_spillage",
    "bloch_hamiltonian",
]

#: The Kane–Mele model without Rashba coupling is topological exactly when
#: |lambda_v| < KANE_MELE_BOUNDARY * lambda_SO (Kane and Mele, PRL 95, 226801 (2005)).
KANE_MELE_BOUNDARY: float = 3.0 * np.sqrt(3.0)

#: Smallest gap (model energy units) between the last occupied and the first empty state
#: of the reference without spin-orbit coupling below which the occupied set is
#: ill-defined and :func:`soc_spillage` warns. Common practice (numerical tolerance).
DEGENERACY_TOL: float = 1e-6

_PAULI = np.array(
    [[[0, 1], [1, 0]], [[0, -1j], [1j, 0]], [[1, 0], [0, -1]]], dtype=complex
)
_I2 = np.eye(2, dtype=complex)
#: Relative tolerance used to classify neighbour distances (dimensionless).
_DIST_TOL = 1e-6


class Model(Protocol):
    """What :func:`soc_spillage` needs from a model."""

    @property
    def n_occupied(self) -> int:  # pragma: no cover - protocol
        """Number of occupied spinor bands (electrons per cell)."""

    def hamiltonian(self, kpts: np.ndarray) -> np.ndarray:  # pragma: no cover - protocol
        """Bloch Hamiltonians, shape (nk, nb, nb), at fractional k points (nk, 3)."""

    def without_soc(self) -> "Model":  # pragma: no cover - protocol
        """The same model with every spin-orbit term switched off."""


def _check_kpts(kpts: np.ndarray) -> np.ndarray:
    k = np.asarray(kpts, dtype=float)
    if k.ndim != 2 or k.shape[1] != 3 or not np.all(np.isfinite(k)):
        raise InputError(
            "k points must be a finite array of fractional coordinates",
            value=getattr(k, "shape", k),
            expected="shape (nk, 3)",
        )
    return k


def bloch_hamiltonian(
    kpts: np.ndarray, hoppings: dict[tuple[int, int], np.ndarray]
) -> np.ndarray:
    """Sum ``H(k) = sum_R T_R exp(2 pi i k.R)`` over lattice vectors, vectorised over k.

    Parameters
    ----------
    kpts
        Shape (nk, 3), fractional coordinates (the third is ignored).
    hoppings
        Maps an in-plane lattice vector (n1, n2) to the hopping matrix T_R, shape
        (nb, nb), between the orbitals of the home cell (rows) and of cell R (columns).
        Must contain R and -R with ``T_{-R} = T_R^dagger``.

    Returns
    -------
    numpy.ndarray
        Shape (nk, nb, nb), complex Hermitian.
    """
    k = _check_kpts(kpts)
    shifts = np.array(list(hoppings), dtype=float)  # (nR, 2)
    mats = np.stack([np.asarray(m, dtype=complex) for m in hoppings.values()])
    phases = np.exp(2j * np.pi * k[:, :2] @ shifts.T)  # (nk, nR)
    return np.einsum("kr,rij->kij", phases, mats)


def kmesh(n1: int, n2: int | None = None) -> np.ndarray:
    """Gamma-centred uniform mesh in fractional coordinates, components in [-1/2, 1/2).

    Parameters
    ----------
    n1, n2
        Divisions along the two in-plane reciprocal vectors (``n2`` defaults to ``n1``).
        For hexagonal cells take multiples of 3 so that K = (1/3, 1/3) and
        K' = (-1/3, -1/3) lie on the mesh: the spillage of a Dirac material lives
        exactly there, and a mesh missing them gives a false negative.

    Returns
    -------
    numpy.ndarray
        Shape (n1 * n2, 3); the third component is zero.
    """
    n2 = n1 if n2 is None else n2
    for name, n in (("n1", n1), ("n2", n2)):
        if int(n) != n or n < 1:
            raise InputError(f"mesh size {name} must be a positive integer", value=n,
                             expected="an integer >= 1")
    f1 = np.arange(n1) / n1
    f2 = np.arange(n2) / n2
    f1 = np.where(f1 >= 0.5, f1 - 1.0, f1)
    f2 = np.where(f2 >= 0.5, f2 - 1.0, f2)
    g1, g2 = np.meshgrid(f1, f2, indexing="ij")
    return np.column_stack([g1.ravel(), g2.ravel(), np.zeros(g1.size)])


def _add(hops: dict[tuple[int, int], np.ndarray], r: tuple[int, int], i: int, j: int,
         block: np.ndarray) -> None:
    """Add the 2x2 spin block for orbitals (i in cell 0, j in cell r)."""
    hops[r][2 * i:2 * i + 2, 2 * j:2 * j + 2] += block


class _LatticeModel:
    """Behaviour shared by the dataclass models: finite parameters, Bloch sums."""

    _hoppings: dict[tuple[int, int], np.ndarray]

    def __post_init__(self) -> None:
        for f in dataclasses.fields(self):  # type: ignore[arg-type]
            value = getattr(self, f.name)
            if not np.isfinite(value):
                raise InputError(f"{type(self).__name__}.{f.name} must be finite",
                                 value=value, expected="a finite energy")

    def hamiltonian(self, kpts: np.ndarray) -> np.ndarray:
        """Bloch Hamiltonians, shape (nk, nb, nb), in the basis order of the class.

        Parameters
        ----------
        kpts
            Shape (nk, 3), fractional coordinates.
        """
        return bloch_hamiltonian(kpts, self._hoppings)


# --------------------------------------------------------------------------- Kane–Mele


@dataclass(frozen=True)
class KaneMele(_LatticeModel):
    """The Kane–Mele model on the honeycomb lattice (nearest-neighbour distance 1).

    ``H = t sum_<ij> c_i^+ c_j + i lambda_so sum_<<ij>> nu_ij c_i^+ s_z c_j
    + i lambda_r sum_<ij> c_i^+ (s x d_ij)_z c_j + lambda_v sum_i xi_i c_i^+ c_i``,
    equation (1) of Kane and Mele, Phys. Rev. Lett. 95, 146802 (2005), with
    nu_ij = +-1 the chirality of the second-neighbour path, d_ij the unit bond vector
    and xi = +1 on sublattice A, -1 on B. Half filling: two of the four bands occupied.
Basis (A up, A down, B up, B down).

    Attributes
    ----------
    t
        Nearest-neighbour hopping (energy unit).
    lambda_so
        Intrinsic spin-orbit coupling (energy).
    lambda_r
        Rashba coupling (energy).
    lambda_v
        Staggered sublattice potential (energy).

    Notes
    -----
    The lattice vectors are a1 = a(1, 0), a2 = a(-1/2, sqrt(3)/2) with a = sqrt(3)
    (the 120-degree setting used by ASE and pymatgen), A at (1/3, 2/3) and B at
    (2/3, 1/3) in fractional coordinates, so K = (1/3, 1/3) and K' = (-1/3, -1/3).
    """

    t: float = 1.0
    lambda_so: float = 0.06
    lambda_r: float = 0.0
    lambda_v: float = 0.0

    n_occupied = 2
    #: Fractional coordinates of the K point (where the Dirac cones sit).
    K_POINT = np.array([1.0 / 3.0, 1.0 / 3.0, 0.0])

    def without_soc(self) -> "KaneMele":
        """The same model with lambda_so = lambda_r = 0 (every spin-orbit term off)."""
        return dataclasses.replace(self, lambda_so=0.0, lambda_r=0.0)

    @cached_property
    def _hoppings(self) -> dict[tuple[int, int], np.ndarray]:
        a = np.sqrt(3.0)
        cell = a * np.array([[1.0, 0.0], [-0.5, np.sqrt(3.0) / 2.0]])
        frac = np.array([[1.0 / 3.0, 2.0 / 3.0], [2.0 / 3.0, 1.0 / 3.0]])
        sites = frac @ cell
        xi = (1.0, -1.0)
        shifts = [(n1, n2) for n1 in range(-2, 3) for n2 in range(-2, 3)]
        hops = {r: np.zeros((4, 4), dtype=complex) for r in shifts}
        # nearest-neighbour bond vectors leaving each sublattice (for the chirality)
        bonds: dict[int, list[np.ndarray]] = {0: [], 1: []}
        for i in range(2):
            for r in shifts:
                for j in range(2):
                    d = sites[j] + np.array(r) @ cell - sites[i]
                    if abs(np.linalg.norm(d) - 1.0) < _DIST_TOL:
                        bonds[i].append(d)
        for i in range(2):
            _add(hops, (0, 0), i, i, self.lambda_v * xi[i] * _I2)
            for r in shifts:
                for j in range(2):
                    # d points from site i (cell 0) to site j (cell r): the electron
                    # hops j -> i, so d_ij of the paper (from j to i) is -d.
                    d = sites[j] + np.array(r) @ cell - sites[i]
                    dist = np.linalg.norm(d)
                    if abs(dist - 1.0) < _DIST_TOL:
                        dhat = -d / dist
                        s_cross_d = _PAULI[0] * dhat[1] - _PAULI[1] * dhat[0]
                        _add(hops, r, i, j, self.t * _I2 + 1j * self.lambda_r * s_cross_d)
                    elif abs(dist - np.sqrt(3.0)) < _DIST_TOL:
                        # path j -> m -> i: first bond d1 leaves j, second d2 reaches i
                        nu = 0.0
                        for d1 in bonds[j]:
                            d2 = -d - d1
                            if abs(np.linalg.norm(d2) - 1.0) < _DIST_TOL:
                                nu = np.sign(d1[0] * d2[1] - d1[1] * d2[0])
                        _add(hops, r, i, j, 1j * self.lambda_so * nu * _PAULI[2])
        return {r: m for r, m in hops.items() if np.any(m != 0)}



# ------------------------------------------------------------------ s-p square lattice


def _slater_koster_sp(direction: np.ndarray, v_sss: float, v_sps: float, v_pps: float,
                      v_ppp: float) -> np.ndarray:
    """Two-centre integrals between (s, p_x, p_y) orbitals along a unit ``direction``.

    Slater and Koster, Phys. Rev. 94, 1498 (1954), Table I: E_ss = V_ss_sigma,
    E_s,x = l V_sp_sigma, E_x,x = l^2 V_pp_sigma + (1 - l^2) V_pp_pi,
    E_x,y = l m (V_pp_sigma - V_pp_pi); E_x,s(d) = E_s,x(-d).
    """
    l, m = direction
    e = np.empty((3, 3))
    e[0, 0] = v_sss
    e[0, 1], e[0, 2] = l * v_sps, m * v_sps
    e[1, 0], e[2, 0] = -l * v_sps, -m * v_sps
    e[1, 1] = l * l * v_pps + (1 - l * l) * v_ppp
    e[2, 2] = m * m * v_pps + (1 - m * m) * v_ppp
    e[1, 2] = e[2, 1] = l * m * (v_pps - v_ppp)
    return e


@dataclass(frozen=True)
class SPSquare(_LatticeModel):
    """s, p_x, p_y orbitals on a square lattice with on-site p-shell spin-orbit coupling.

    Nearest-neighbour Slater–Koster hoppings (Slater and Koster, Phys. Rev. 94, 1498
    (1954)) and ``H_SO = lambda_so L.S`` on the p shell. With p_z left out (a flat layer
    whose p_z band lies far away), L.S within {p_x, p_y} reduces to L_z S_z, so the
    p_x/p_y pair at Gamma splits into two Kramers pairs at E_p(Gamma) -+ lambda_so/2.
    Four electrons per cell (the two p bands of each spin). Basis (s, p_x, p_y) x
    (up, down), orbital-major.

    Without spin-orbit coupling the defaults give a trivial insulator whose smallest gap
    (direct and indirect), ``gap_gamma = E_s(Gamma) - E_p(Gamma)``, is at Gamma, where s
    and p do not hybridise. The defaults keep sigma bonds only (V_pp_pi = 0, as in the
    p_x/p_y honeycomb of Wu, Bergman, Balents and Das Sarma, PRL 99, 070401 (2007),
    recalled from memory):
    a pi bond would lift the p maximum to X above its value at Gamma, and the model would
    turn semimetallic (bands overlapping) near the transition.
    For ``lambda_so > 2 * gap_gamma`` the upper p Kramers pair (j_z = +-3/2, like the
    heavy holes of Bernevig, Hughes and Zhang, Science 314, 1757 (2006)) lies above the
    s pair at Gamma: the inverted band order that BHZ show makes a quantum spin Hall
    insulator, with spin-orbit spillage 2 at Gamma (two inverted electrons).

    Attributes
    ----------
    e_s, e_p
        On-site energies (energy units).
    v_sss, v_sps, v_pps, v_ppp
        Slater–Koster two-centre integrals V_ss_sigma, V_sp_sigma, V_pp_sigma, V_pp_pi.
    lambda_so
        Spin-orbit constant of the p shell.
    """

    e_s: float = 3.3
    e_p: float = 0.0
    v_sss: float = -0.5
    v_sps: float = 0.5
    v_pps: float = 0.5
    v_ppp: float = 0.0
    lambda_so: float = 0.0

    n_occupied = 4
    GAMMA_POINT = np.zeros(3)

    @property
    def gap_gamma(self) -> float:
        """E_s(Gamma) - E_p(Gamma) without spin-orbit coupling (energy units)."""
        return (self.e_s + 4 * self.v_sss) - (self.e_p + 2 * self.v_pps + 2 * self.v_ppp)

    @property
    def critical_lambda(self) -> float:
        """lambda_so at which the s and upper p Kramers pairs cross at Gamma."""
        return 2.0 * self.gap_gamma

    def without_soc(self) -> "SPSquare":
        """The same model with lambda_so = 0."""
        return dataclasses.replace(self, lambda_so=0.0)

    @cached_property
    def _hoppings(self) -> dict[tuple[int, int], np.ndarray]:
        hops: dict[tuple[int, int], np.ndarray] = {}
        onsite = np.zeros((6, 6), dtype=complex)
        onsite += np.kron(np.diag([self.e_s, self.e_p, self.e_p]), _I2)
        l_z = np.zeros((3, 3), dtype=complex)
        l_z[1, 2], l_z[2, 1] = -1j, 1j  # <p_x|L_z|p_y> = -i (hbar = 1)
        onsite += self.lambda_so * np.kron(l_z, _PAULI[2] / 2.0)
        hops[(0, 0)] = onsite
        for r in ((1, 0), (-1, 0), (0, 1), (0, -1)):
            e = _slater_koster_sp(np.array(r, dtype=float), self.v_sss, self.v_sps,
                                  self.v_pps, self.v_ppp)
            hops[r] = np.kron(e, _I2).astype(complex)
        return hops



# ---------------------------------------------------------------------- BHZ (lattice)


def bhz_hamiltonian(kpts: np.ndarray, *, a: float = 1.0, b: float = 1.0,
                    m: float = 1.0) -> np.ndarray:
    """The BHZ lattice Hamiltonian, shape (nk, 4, 4), with C = D = 0.

    ``h(k) = d.sigma`` with d = (A sin kx, A sin ky, M - 2B(2 - cos kx - cos ky)) for the
    spin-up block (E1+, H1+) and ``h*(-k)`` for its time-reversed partner (Bernevig,
    Hughes and Zhang, Science 314, 1757 (2006)); two of the four bands occupied.

    Parameters
    ----------
    kpts
        Shape (nk, 3), fractional coordinates (kx = 2 pi k1, ky = 2 pi k2).
    a, b, m
        The BHZ parameters A, B, M (energy units).
    """
    k = 2.0 * np.pi * _check_kpts(kpts)
    sx, sy = np.sin(k[:, 0]), np.sin(k[:, 1])
    dz = m - 2.0 * b * (2.0 - np.cos(k[:, 0]) - np.cos(k[:, 1]))
    up = a * sx[:, None, None] * _PAULI[0] + a * sy[:, None, None] * _PAULI[1] \
        + dz[:, None, None] * _PAULI[2]
    down = -a * sx[:, None, None] * _PAULI[0] + a * sy[:, None, None] * _PAULI[1] \
        + dz[:, None, None] * _PAULI[2]
    h = np.zeros((k.shape[0], 4, 4), dtype=complex)
    h[:, :2, :2] = up
    h[:, 2:, 2:] = down
    return h


# ------------------------------------------------------------------------- spillage


def soc_spillage(model: Model, kpts: np.ndarray, reference: Model | None = None
                 ) -> SpillageResult:
    """Spillage between a model without and with spin-orbit coupling on given k points.

    Parameters
    ----------
    model
        The model with spin-orbit coupling (e.g. :class:`KaneMele`).
    kpts
        Shape (nk, 3), fractional coordinates; for hexagonal cells the mesh must
        contain K (:func:`kmesh` with n divisible by 3).
    reference
        The model without spin-orbit coupling; ``model.without_soc()`` by default
        (every spin-orbit term off, as in a DFT calculation without SOC). Pass e.g.
        ``dataclasses.replace(km, lambda_so=0.0)`` to keep the Rashba term.

    Returns
    -------
    SpillageResult
        Occupations are the lowest ``model.n_occupied`` states at every k (the models
        are insulators when gapped).

    Warns
    -----
    PrescreenWarning
        If the reference is (nearly) gapless at some k point, where its occupied set —
        and so the spillage — depends on an arbitrary choice among degenerate states.
    """
    k = _check_kpts(kpts)
    ref = model.without_soc() if reference is None else reference
    n = model.n_occupied
    e0, v0 = np.linalg.eigh(ref.hamiltonian(k))
    _, v1 = np.linalg.eigh(model.hamiltonian(k))
    gap = e0[:, n] - e0[:, n - 1]
    if np.any(gap < DEGENERACY_TOL):
        bad = int(np.argmin(gap))
        warnings.warn(
            f"the reference without spin-orbit coupling is gapless at k = {k[bad].tolist()} "
            f"(gap {gap[bad]:.2e}); the spillage there depends on an arbitrary choice",
            PrescreenWarning,
            stacklevel=2,
        )
    occ = np.ones((k.shape[0], n))
    return spillage_from_eigenvectors(v0[:, :, :n], v1[:, :, :n], occ, occ, k)


