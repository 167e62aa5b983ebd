"""The Z2 invariant of a monolayer from DFT Wilson loops, with or without inversion.

The parity criterion (:mod:`prescreen.physics.parity`) needs an inversion centre; 2H,
Janus and other polar layers have none. For any non-magnetic insulator the Z2 invariant
is the parity of the number of times the hybrid Wannier charge centres (the eigenphases
of Wilson loops along k1) wind over half the Brillouin zone in k2 (Yu, Qi, Bernevig, Fang
and Dai, Phys. Rev. B 84, 075119 (2011); Soluyanov and Vanderbilt, Phys. Rev. B 83,
235401 (2011)). This module computes them at the labeller's level of theory
(:mod:`prescreen.physics.dft`: GPAW LCAO, PBE, dzp, spin-orbit coupling added
non-self-consistently):

1. A self-consistent ground state on the labeller's mesh.
2. For each line ``k2`` in [0, 1/2], a non-self-consistent run (GPAW's ``fixed_density``,
   no symmetry) on ``nk1`` points ``k1 = j / nk1``, and the spinor states with SOC of
   :func:`gpaw.spinorbit.soc_eigenstates` (basis ``2 n + s`` of the states ``n`` without
   SOC, as in :mod:`prescreen.physics.dft`). In GPAW's Bloch sums
   ``Phi_Mk(r) = sum_R exp(i k.R) phi_M(r - tau_a - R)`` an occupied spinor state ``m``
   has coefficients ``W[m, M, s] = sum_n V[m, 2 n + s] C[n, M]``.
3. The overlap of cell-periodic parts between neighbours ``k`` and ``k + b`` is taken in
   the point-orbital approximation ``exp(-i b.r) phi_M ~ exp(-i b.tau_a) phi_M``, the usual
   one for localised bases, split evenly between the two ends so that the link from
   ``k + b`` back to ``k`` is exactly the adjoint:
   ``M = W(k)* D [S(k) + S(k + b)] / 2 D W(k + b)^T`` with ``D = diag(exp(-i b.tau / 2))``.
   The same Bloch sums at ``k + G`` equal those at ``k``, so the loop closes with
   ``W(k1 = 1) = W(k1 = 0)`` and the phase of ``b`` taken across the zone boundary.
   The approximation drops intra-atomic dipoles: the centres follow the tight-binding
   convention (in a test on hBN they sat 0.01-0.05 a1 from the centres of exact grid
   overlaps) and do not converge to the true hybrid Wannier centres as ``b`` shrinks.
   That is a continuous, time-reversal-symmetric change of the centres, which leaves
   the count, and so Z2, unchanged.
4. The Wilson loop is the product of the unitary parts of the links; minus its
   eigenphases over 2 pi are the centres (in units of a1), and :func:`prescreen.physics.z2.z2_from_flow` counts the flow,
   adding lines by bisection where it is unresolved (one more GPAW run per pass).

Checks, each a refusal with the reason rather than a guess: the layer must have a direct
gap with SOC on every sampled k point, an even electron count, and links whose smallest
singular value is at least :data:`MIN_LINK` (else the loops are recomputed with twice
the points along k1, up to :data:`MAX_NK1`). Magnetic settings are refused: the invariant needs
time-reversal symmetry.
"""

from __future__ import annotations

import re
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from prescreen.errors import InputError, LabellingError, NoDirectGap, PrescreenError
from prescreen.physics.dft import (
    METAL_GAP_EV,
    LabelSettings,
    _formula,
    _gpaw_calculator,
    _one_thread,
    _run_in,
    choose_kpts,
    code_versions,
    direct_band_gap,
    in_lcao,
    kramers_occupied,
    prepare_monolayer,
)

if TYPE_CHECKING:  # pragma: no cover - typing only
    from ase import Atoms
    from pymatgen.core import Structure

__all__ = ["MIN_LINK", "NK1", "MAX_NK1", "N_LINES", "WilsonZ2", "point_orbital_link", "loop_centres", "z2_from_wilson_loops",
           "plot_flow", "refused_below_cap", "coarse_loops_reason"]

#: k points per Wilson loop along k1 to start with; doubled while any link is further
#: from unitary than :data:`MIN_LINK`, up to :data:`MAX_NK1`. Chosen here.
NK1: int = 24
#: Most k points per loop (the last doubling). Raised from 96: the three layers of the
#: open dataset refused at 96 (smallest link 0.74-0.77) were resolved at 192 (0.89-0.91,
#: or a direct gap found below the threshold), at 1-4 minutes each.
MAX_NK1: int = 192
#: Initial number of Wilson loops over k2 in [0, 1/2] (refined where needed).
N_LINES: int = 9
#: Most loops over k2 before the flow is declared unresolved.
MAX_LINES: int = 65
#: Smallest singular value of a link accepted (dimensionless; 1 for an infinitesimal
#: step). Below it the occupied subspace turns too much between neighbouring k for the
#: step (a nearly closed gap, or a coarse loop) and the loop is refined. Chosen here:
#: exact grid overlaps of a hBN layer give about 0.96 at 16 points per loop.
MIN_LINK: float = 0.8


_COARSE_REFUSAL = re.compile(r"Wilson-loop links far from unitary with (\d+) points per loop")


def coarse_loops_reason(name: str, size: int, min_link: float) -> str:
    """The refusal of loops whose links stay far from unitary at ``size`` points per loop
    (the last doubling); :func:`refused_below_cap` recognises it."""
    return (f"{name}: Wilson-loop links far from unitary with {size} points per loop "
            f"(smallest singular value {min_link:.3f}, expected >= {MIN_LINK}): the occupied "
            "states turn too fast for the step, a sign of a nearly closed gap; no invariant "
            "is given")


def refused_below_cap(reason: str) -> bool:
    """Whether ``reason`` is a refusal for coarse loops made with fewer points per loop
    than :data:`MAX_NK1` now allows (an earlier release's cap): computing again may work."""
    found = _COARSE_REFUSAL.search(str(reason))
    return found is not None and int(found.group(1)) < MAX_NK1


class _CoarseLoops(Exception):
    """A link's smallest singular value fell below :data:`MIN_LINK` (refine the loops)."""

    def __init__(self, min_link: float) -> None:
        super().__init__(f"smallest link singular value {min_link:.3f}")
        self.min_link = min_link


@dataclass(frozen=True)
class WilsonZ2:
    """The Z2 invariant of one monolayer from the flow of its Wannier charge centres.

    Attributes
    ----------
    z2
        0 (trivial) or 1 (quantum spin Hall).
    k2
        Fractional k2 of the Wilson loops, from 0 to 1/2.
    wcc
        Per loop, the sorted centres of the occupied spinor states (units of a1, [0, 1)).
    gap_centres
        Per loop, the middle of the largest gap between centres (the tracked line).
    direct_gap_soc_eV
        Smallest direct gap with SOC on the sampled k points (eV).
    min_link
        Smallest singular value of any link (see :data:`MIN_LINK`).
    """

    id: str | None
    formula: str
    z2: int
    k2: tuple[float, ...]
    wcc: tuple[tuple[float, ...], ...]
    gap_centres: tuple[float, ...]
    direct_gap_soc_eV: float
    min_link: float
    n_occupied: int
    nk1: int
    kmesh: tuple[int, int, int]
    settings: dict[str, Any] = field(default_factory=dict)
    versions: dict[str, str] = field(default_factory=dict)
    wall_s: float = 0.0

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "WilsonZ2":
        """Inverse of :meth:`as_dict`."""
        return cls(id=d["id"], formula=d["formula"], z2=int(d["z2"]),
                   k2=tuple(map(float, d["k2"])),
                   wcc=tuple(tuple(map(float, w)) for w in d["wcc"]),
                   gap_centres=tuple(map(float, d["gap_centres"])),
                   direct_gap_soc_eV=float(d["direct_gap_soc_eV"]),
                   min_link=float(d["min_link"]), n_occupied=int(d["n_occupied"]),
                   nk1=int(d["nk1"]), kmesh=tuple(d["kmesh"]),
                   settings=dict(d.get("settings", {})), versions=dict(d.get("versions", {})),
                   wall_s=float(d.get("wall_s", 0.0)))

    def as_dict(self) -> dict[str, Any]:
        """A JSON-friendly dictionary."""
        return {"id": self.id, "formula": self.formula, "z2": self.z2, "k2": list(self.k2),
                "wcc": [list(w) for w in self.wcc], "gap_centres": list(self.gap_centres),
                "direct_gap_soc_eV": self.direct_gap_soc_eV, "min_link": self.min_link,
                "n_occupied": self.n_occupied, "nk1": self.nk1, "kmesh": list(self.kmesh),
                "settings": self.settings, "versions": self.versions, "wall_s": self.wall_s}


def _orbital_centres(calc: Any) -> np.ndarray:
    """Fractional position of the atom of every LCAO basis function, in GPAW's order."""
    relpos = np.asarray(calc.dft.relpos_ac, dtype=float)
    owner: list[int] = []
    for a, setup in enumerate(calc.dft.setups):
        for spline in setup.basis_functions_J:
            owner += [a] * (2 * spline.l + 1)
    return relpos[owner]


def point_orbital_link(Ca: np.ndarray, Cb: np.ndarray, Sa: np.ndarray, Sb: np.ndarray,
                       b_tau: np.ndarray) -> np.ndarray:
    """Overlaps ``<u_m,k|u_n,k+b>`` of cell-periodic parts from LCAO coefficients.

    ``M = Ca* D (Sa + Sb) / 2 D Cb^T`` summed over spin, ``D = diag(exp(-i pi b.tau))``
    (step 3 of the module notes; ``b.tau`` in cycles, i.e. fractional ``b`` times
    fractional ``tau``). Arrays ``Ca``, ``Cb`` have shape (n, nM, n_spin) (coefficients
    of GPAW's Bloch sums, band rows), ``Sa``, ``Sb`` shape (nM, nM), ``b_tau`` shape (nM,).
    """
    half = np.exp(-1j * np.pi * np.asarray(b_tau, dtype=float))
    s_mid = half[:, None] * (0.5 * (Sa + Sb)) * half[None, :]
    return sum(Ca[:, :, s].conj() @ s_mid @ Cb[:, :, s].T for s in range(Ca.shape[2]))


def loop_centres(C: np.ndarray, S: np.ndarray, tau: np.ndarray, nk1: int) -> tuple[np.ndarray, float]:
    """Wannier charge centres of one closed loop along k1 from LCAO spinor coefficients.

    Parameters
    ----------
    C
        Shape (nk1, n_occ, nM, 2): coefficients ``W[m, M, s]`` of the occupied spinor
        states at ``k1 = j / nk1`` (step 2 of the module notes).
    S
        Shape (nk1, nM, nM): the basis overlap ``S_MN(k)`` at the same points.
    tau
        Shape (nM, 3): fractional position of the atom of each basis function.
    nk1
        Number of points on the loop.

    Returns
    -------
    wcc : numpy.ndarray
        Sorted centres in [0, 1) (units of a1).
    min_link : float
        Smallest singular value of the links.
    """
    n_occ = C.shape[1]
    w = np.eye(n_occ, dtype=complex)
    worst = 1.0
    for j in range(nk1):
        # the closing step crosses the zone boundary with the same b and Bloch sums
        nxt = (j + 1) % nk1
        m = point_orbital_link(C[j], C[nxt], S[j], S[nxt], tau[:, 0] / nk1)
        left, sv, right = np.linalg.svd(m)
        worst = min(worst, float(sv.min()))
        w = w @ (left @ right)
    # a centre is minus the Berry phase over 2 pi (Marzari and Vanderbilt, PRB 56, 12847
    # (1997), with M(k, k + b) = <u_k|u_k+b>)
    centres = -np.angle(np.linalg.eigvals(w)) / (2.0 * np.pi)
    return np.sort(np.mod(centres, 1.0)), worst


def _line_states(calc: Any, k2: np.ndarray, nk1: int, n_occ: int, soc_scale: float,
                 txt: Path) -> tuple[list[np.ndarray], list[np.ndarray], np.ndarray, float]:
    """Occupied spinor coefficients and overlaps on the loops ``k2`` (one GPAW run)."""
    from gpaw.spinorbit import soc_eigenstates

    k1 = np.arange(nk1) / nk1
    kpts = np.array([[x, y, 0.0] for y in k2 for x in k1])
    nscf = calc.fixed_density(kpts=kpts, symmetry="off", txt=str(txt))
    got = np.asarray(nscf.get_bz_k_points(), dtype=float)
    if got.shape != kpts.shape or not np.allclose(got, kpts, atol=1e-10):
        raise LabellingError(f"GPAW returned {got.shape[0]} k points not in the requested "
                             f"order (expected the {kpts.shape[0]} points of the loops in "
                             "order); no invariant is given")
    soc = soc_eigenstates(nscf, scale=soc_scale)
    v_kmn = soc.eigenvectors()  # [k, SOC state m, basis 2 n + s]
    e_soc = soc.eigenvalues()
    wfs = {int(w.k): (w.C_nM.data, w.S_MM.data) for w in nscf.dft.ibzwfs}
    if len(wfs) != len(kpts):
        raise LabellingError(f"expected {len(kpts)} k points without symmetry reduction, "
                             f"got {len(wfs)}")
    coeffs, overlaps = [], []
    for i in range(len(k2)):
        c_line, s_line = [], []
        for j in range(nk1):
            k = i * nk1 + j
            c, s = wfs[k]
            v = v_kmn[k, :n_occ, :]
            c_line.append(np.stack([v[:, spin::2] @ c for spin in range(2)], axis=-1))
            s_line.append(s)
        coeffs.append(np.array(c_line))
        overlaps.append(np.array(s_line))
    return coeffs, overlaps, _orbital_centres(nscf), direct_band_gap(e_soc, n_occ)


def z2_from_wilson_loops(structure: "Structure | Atoms", settings: LabelSettings = LabelSettings(),
                         *, id: str | None = None, workdir: Path | None = None,
                         nk1: int = NK1, n_lines: int = N_LINES,
                         max_lines: int = MAX_LINES, max_nk1: int = MAX_NK1) -> WilsonZ2:
    """Compute the Z2 invariant of a non-magnetic insulating monolayer from Wilson loops.

    Parameters
    ----------
    structure
        The monolayer (pymatgen ``Structure`` or ``ase.Atoms``), relaxed or as given.
    settings
        Level of theory (:class:`~prescreen.physics.dft.LabelSettings`); ``spinpol`` must
        be False.
    id
        Identifier carried into the result.
    workdir
        Folder for GPAW's logs; a temporary folder when None.
    nk1, n_lines, max_lines
        Points per loop, initial loops over k2 in [0, 1/2], and the refinement limit.
    max_nk1
        Points per loop are doubled from ``nk1`` while a link's smallest singular value is
        below :data:`MIN_LINK`, up to this many; the flow is recomputed each time.

    Returns
    -------
    WilsonZ2

    Raises
    ------
    InputError
        Magnetic settings, or ``nk1`` / ``n_lines`` out of range.
    LabellingError
        GPAW failed, the layer has no direct gap with SOC on a sampled k point, the
        electron count is odd, the links are too far from unitary, or the flow is not
        resolved within ``max_lines`` loops.
    """
    if settings.spinpol:
        raise InputError(f"{id or 'structure'}: the Z2 invariant needs time-reversal symmetry",
                         value="spinpol=True",
                         expected="a non-magnetic calculation (spinpol=False)")
    if nk1 < 4 or n_lines < 2 or max_lines < n_lines or max_nk1 < nk1:
        raise InputError("too few Wilson loops or points per loop",
                         value=f"nk1={nk1}, n_lines={n_lines}, max_lines={max_lines}, "
                         f"max_nk1={max_nk1}",
                         expected="nk1 >= 4, n_lines >= 2, max_lines >= n_lines, "
                         "max_nk1 >= nk1")
    t0 = time.perf_counter()
    settings = in_lcao(settings)  # the loops are built from LCAO coefficients
    atoms = prepare_monolayer(structure, settings.vacuum_A)
    formula = _formula(atoms)
    name = id or formula
    kmesh = choose_kpts(atoms, settings)
    try:
        import gpaw.spinorbit  # noqa: F401
    except ImportError as exc:
        raise LabellingError(f"{name}: GPAW is not importable; install it with "
                             "`bash scripts/install_gpaw.sh .venv` (or `make dft-env`)") from exc
    stats = {"min_link": 1.0, "gap": np.inf, "runs": 0}
    with _run_in(workdir) as folder, _one_thread():
        try:
            calc = _gpaw_calculator(settings, kmesh, folder / "gpaw-wilson.txt", False)
            atoms.calc = calc
            atoms.get_potential_energy()
            n_electrons = float(calc.get_number_of_electrons())
        except Exception as exc:  # GPAW raises many types; keep the cause
            raise LabellingError(f"{name}: GPAW calculation failed: "
                                 f"{type(exc).__name__}: {exc}") from exc
        n_occ = kramers_occupied(name, n_electrons)

        def centres(k2: np.ndarray, size: int) -> tuple[np.ndarray, float]:
            stats["runs"] += 1
            try:
                coeffs, overlaps, tau, gap = _line_states(
                    calc, np.asarray(k2, dtype=float), size, n_occ, settings.soc_scale,
                    folder / f"gpaw-wilson-nscf{stats['runs']}.txt")
            except LabellingError as exc:
                raise LabellingError(f"{name}: {exc}") from exc
            except Exception as exc:
                raise LabellingError(f"{name}: GPAW non-self-consistent run failed: "
                                     f"{type(exc).__name__}: {exc}") from exc
            if gap < METAL_GAP_EV:
                raise NoDirectGap(
                    f"{name}: no direct gap with spin-orbit coupling on a Wilson loop "
                    f"(smallest {gap:.3f} eV < {METAL_GAP_EV} eV): the occupied states, and "
                    "so the invariant, are not defined", gap)
            stats["gap"] = min(stats["gap"], gap)
            wcc = []
            for y, c, s in zip(np.atleast_1d(k2), coeffs, overlaps):
                try:
                    w, worst = loop_centres(c, s, tau, size)
                except np.linalg.LinAlgError as exc:
                    raise LabellingError(f"{name}: Wilson loop at k2 = {float(y):.4f} failed: "
                                         f"{exc}") from exc
                stats["min_link"] = min(stats["min_link"], worst)
                wcc.append(w)
            if stats["min_link"] < MIN_LINK:
                raise _CoarseLoops(stats["min_link"])
            return np.array(wcc), gap

        from prescreen.physics.z2 import z2_from_flow

        size, flow = nk1, None
        while flow is None:
            stats["min_link"] = 1.0
            try:
                flow = z2_from_flow(lambda k2: centres(k2, size), n_lines=n_lines,
                                    max_lines=max_lines)
            except _CoarseLoops as coarse:
                if 2 * size > max_nk1:
                    raise LabellingError(
                        coarse_loops_reason(name, size, coarse.min_link)) from None
                size *= 2
            except LabellingError:
                raise
            except PrescreenError as exc:
                raise LabellingError(f"{name}: {exc}") from exc
    nk1 = size
    sdict = settings.as_dict()
    sdict.update(kmesh=list(kmesh), mode="lcao", nbands="nao", nk1=nk1)
    return WilsonZ2(id=id, formula=formula, z2=int(flow.z2),
                    k2=tuple(float(k) for k in flow.k2),
                    wcc=tuple(tuple(float(x) for x in w) for w in flow.wcc),
                    gap_centres=tuple(float(g) for g in flow.gap_centres),
                    direct_gap_soc_eV=float(stats["gap"]), min_link=float(stats["min_link"]),
                    n_occupied=n_occ, nk1=nk1, kmesh=kmesh, settings=sdict,
                    versions=code_versions(), wall_s=time.perf_counter() - t0)


def plot_flow(result: WilsonZ2, ax: Any = None) -> Any:
    """Plot the Wannier-centre flow: centres against k2, with the tracked largest gap.

    Draws into ``ax`` when given, else into a new figure (not registered with pyplot).
    Returns the matplotlib ``Axes``.
    """
    if ax is None:
        from matplotlib.figure import Figure

        ax = Figure(figsize=(4.5, 3.5), layout="constrained").subplots()
    k2 = np.asarray(result.k2)
    for i, (w_line, k) in enumerate(zip(result.wcc, k2)):
        ax.plot(np.full(len(w_line), k), w_line, "o", ms=2.5, color="0.25", ls="none",
                label="Wannier charge centres" if i == 0 else None)
    ax.plot(k2, result.gap_centres, "D", ms=4, color="tab:red", ls="none",
            label="middle of the largest gap")
    ax.set_xlim(0.0, 0.5)
    ax.set_ylim(0.0, 1.0)
    ax.set_xlabel("$k_2$ (units of $b_2$)")
    ax.set_ylabel("Wannier charge centre (units of $a_1$)")
    name = result.formula if not result.id else f"{result.id} ({result.formula})"
    ax.set_title(f"{name}: Z2 = {result.z2}")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize="small", frameon=False)
    return ax
