"""Topological invariants of two-dimensional Bloch Hamiltonians, independent of spillage.

* :func:`z2_invariant` — the time-reversal Z2 invariant from the flow of hybrid Wannier
  charge centres (Wilson-loop eigenphases) over half the Brillouin zone (Yu, Qi,
  Bernevig, Fang and Dai, Phys. Rev. B 84, 075119 (2011)), counted with the
  largest-gap rule of Soluyanov and Vanderbilt, Phys. Rev. B 83, 235401 (2011). It needs
  neither inversion symmetry nor spin conservation, so it works with Rashba coupling.
* :func:`chern_number` — the lattice Chern number of Fukui, Hatsugai and Suzuki,
  J. Phys. Soc. Jpn. 74, 1674 (2005); with S_z conserved, the Chern number of one spin
  block modulo 2 is the Z2 invariant (an independent cross-check).

A Hamiltonian is any callable ``hamiltonian(kpts) -> H`` taking fractional k points of
shape (nk, 3) and returning Hermitian matrices of shape (nk, nb, nb) that are periodic,
``H(k + G) = H(k)`` (the gauge of :mod:`prescreen.physics.tightbinding`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from prescreen.errors import InputError, PrescreenError

__all__ = [
    "GAP_TOL",
    "Z2Result",
    "wannier_centres",
    "z2_from_flow",
    "z2_invariant",
    "chern_number",
]

Hamiltonian = Callable[[np.ndarray], np.ndarray]

#: Smallest direct gap (model energy units) between occupied and empty bands accepted
#: on the sampled k points; below it the occupied subspace, and so the invariant, is
#: undefined. Common practice (numerical tolerance).
GAP_TOL: float = 1e-6

#: Convergence rule of the largest-gap count (Soluyanov and Vanderbilt 2011): no
#: Wannier centre of a neighbouring line may come closer to a gap centre than this
#: fraction of the gap (dimensionless). Common practice.
_GAP_FRACTION: float = 0.3
#: Narrowest spacing of Wilson loops in k2 (fractional) that refinement may reach; an
#: interval still unresolved below it means a (nearly) closed gap. Chosen here.
_MIN_LINE_STEP: float = 1e-5


@dataclass(frozen=True, eq=False)
class Z2Result:
    """Z2 invariant with the Wannier-centre flow it was counted from.

    Attributes
    ----------
    z2
        0 (trivial) or 1 (quantum spin Hall).
    k2
        Shape (nlines,), fractional k2 of the Wilson loops, from 0 to 1/2.
    wcc
        Shape (nlines, n_occ), hybrid Wannier charge centres in units of a1, in [0, 1).
    gap_centres
        Shape (nlines,), middle of the largest gap between centres on each line.
    min_direct_gap
        Smallest direct band gap met on the sampled k points (energy units).
    """

    z2: int
    k2: np.ndarray
    wcc: np.ndarray
    gap_centres: np.ndarray
    min_direct_gap: float

    def as_dict(self) -> dict[str, Any]:
        """Return a JSON-friendly dictionary."""
        return {
            "z2": self.z2,
            "k2": self.k2.tolist(),
            "wcc": self.wcc.tolist(),
            "gap_centres": self.gap_centres.tolist(),
            "min_direct_gap": self.min_direct_gap,
        }


def _occupied_states(hamiltonian: Hamiltonian, kpts: np.ndarray, n_occ: int
                     ) -> tuple[np.ndarray, float]:
    """Occupied eigenvectors, shape (nk, nb, n_occ), and the smallest direct gap."""
    h = np.asarray(hamiltonian(kpts))
    if h.ndim != 3 or h.shape[0] != kpts.shape[0] or h.shape[1] != h.shape[2]:
        raise InputError("the Hamiltonian callable returned the wrong shape",
                         value=h.shape, expected=f"({kpts.shape[0]}, nb, nb)")
    nb = h.shape[1]
    if not 0 < n_occ < nb:
        raise InputError("n_occ must leave occupied and empty bands", value=n_occ,
                         expected=f"an integer in [1, {nb - 1}]")
    e, v = np.linalg.eigh(h)
    gap = float(np.min(e[:, n_occ] - e[:, n_occ - 1]))
    if gap < GAP_TOL:
        bad = int(np.argmin(e[:, n_occ] - e[:, n_occ - 1]))
        raise InputError(
            "occupied and empty bands touch: the invariant is undefined",
            line=f"k = {kpts[bad].tolist()}",
            value=gap,
            expected=f"a direct gap >= {GAP_TOL} everywhere",
        )
    return v[:, :, :n_occ], gap


def wannier_centres(hamiltonian: Hamiltonian, n_occ: int, k2: np.ndarray,
                    nk1: int = 24) -> tuple[np.ndarray, float]:
    """Hybrid Wannier charge centres along k1 for each k2 (Wilson-loop eigenphases).

    Parameters
    ----------
    hamiltonian
        Callable returning periodic Bloch Hamiltonians (see the module notes).
    n_occ
        Number of occupied bands.
    k2
        Shape (nlines,), fractional k2 of each loop.
    nk1
        Number of k points on each loop.

    Returns
    -------
    wcc : numpy.ndarray
        Shape (nlines, n_occ), sorted centres in [0, 1) (units of a1).
    min_gap : float
        Smallest direct gap on the sampled points.
    """
    k2 = np.atleast_1d(np.asarray(k2, dtype=float))
    k1 = np.arange(nk1) / nk1
    g1, g2 = np.meshgrid(k1, k2, indexing="ij")  # (nk1, nlines)
    kpts = np.column_stack([g1.ravel(), g2.ravel(), np.zeros(g1.size)])
    u, gap = _occupied_states(hamiltonian, kpts, n_occ)
    u = u.reshape(nk1, k2.size, -1, n_occ)
    w = np.broadcast_to(np.eye(n_occ, dtype=complex), (k2.size, n_occ, n_occ)).copy()
    for j in range(nk1):
        m = u[j].conj().transpose(0, 2, 1) @ u[(j + 1) % nk1]
        # keep only the unitary part of each link (removes the |det| < 1 of a finite step)
        left, _, right = np.linalg.svd(m)
        w = w @ (left @ right)
    # a centre is minus the Berry phase over 2 pi (Marzari and Vanderbilt, PRB 56, 12847
    # (1997)); in this periodic gauge it is measured from the orbitals' common origin
    centres = -np.angle(np.linalg.eigvals(w)) / (2.0 * np.pi)
    return np.sort(np.mod(centres, 1.0), axis=1), gap


def _largest_gap(wcc: np.ndarray) -> tuple[float, float]:
    """Centre and size of the largest gap between sorted centres on a circle."""
    ext = np.append(wcc, wcc[0] + 1.0)
    gaps = np.diff(ext)
    i = int(np.argmax(gaps))
    return float(np.mod(ext[i] + gaps[i] / 2.0, 1.0)), float(gaps[i])


def _circular_distance(x: np.ndarray, z: float) -> np.ndarray:
    d = np.abs(np.mod(x - z, 1.0))
    return np.minimum(d, 1.0 - d)


def z2_invariant(hamiltonian: Hamiltonian, n_occ: int, *, nk1: int = 24,
                 n_lines: int = 13, max_lines: int = 400) -> Z2Result:
    """Z2 invariant of a time-reversal-symmetric two-dimensional insulator.

    The Wannier-centre flow is sampled on ``n_lines`` loops between k2 = 0 and 1/2 and
    refined by bisection wherever a centre comes within 30 % of a gap of the tracked
    largest-gap centre; Z2 is the parity of the number of centres that the largest-gap
    centre jumps over (Soluyanov and Vanderbilt, PRB 83, 235401 (2011)).

    Parameters
    ----------
    hamiltonian
        Callable returning periodic Bloch Hamiltonians (see the module notes).
    n_occ
        Number of occupied bands (even, Kramers pairs).
    nk1
        k points per Wilson loop.
    n_lines
        Initial number of loops over k2 in [0, 1/2].
    max_lines
        Refinement limit.

    Returns
    -------
    Z2Result

    Raises
    ------
    InputError
        If the bands touch on a sampled point, or n_occ is out of range or odd.
    PrescreenError
        If the flow cannot be resolved within ``max_lines`` loops.
    """
    if int(n_occ) != n_occ or n_occ % 2:
        raise InputError("a time-reversal-symmetric insulator has an even band count",
                         value=n_occ, expected="an even number of occupied bands")
    return z2_from_flow(lambda k2: wannier_centres(hamiltonian, n_occ, k2, nk1),
                        n_lines=n_lines, max_lines=max_lines)


def z2_from_flow(centres: Callable[[np.ndarray], tuple[np.ndarray, float]], *,
                 n_lines: int = 13, max_lines: int = 400) -> Z2Result:
    """Z2 from the flow of hybrid Wannier charge centres over half the Brillouin zone.

    The largest-gap count of Soluyanov and Vanderbilt, PRB 83, 235401 (2011), for any
    source of centres (a model Hamiltonian here, DFT states in
    :mod:`prescreen.physics.wilson`).

    Parameters
    ----------
    centres
        ``centres(k2) -> (wcc, min_gap)``: for fractional ``k2`` of shape (nlines,), the
        sorted centres of shape (nlines, n_occ) in [0, 1) and the smallest direct gap met.
    n_lines
        Initial number of loops over k2 in [0, 1/2]; the flow is refined by bisection
        wherever a centre comes within 30 % of a gap of the tracked largest-gap centre.
    max_lines
        Refinement limit.

    Raises
    ------
    InputError
        If the lines hold an odd number of centres (the count needs Kramers pairs).
    PrescreenError
        If the flow cannot be resolved within ``max_lines`` loops, or an unresolved
        interval is narrower than 1e-5 in k2.
    """
    lines = [float(k) for k in np.linspace(0.0, 0.5, n_lines)]
    wcc_arr, min_gap = centres(np.array(lines))
    if wcc_arr.ndim != 2 or wcc_arr.shape[1] % 2:
        raise InputError("the Wannier-centre flow needs Kramers pairs",
                         value=f"{wcc_arr.shape[-1]} centres per line",
                         expected="an even number of centres per line")
    data = {k: (wcc_arr[i],) + _largest_gap(wcc_arr[i]) for i, k in enumerate(lines)}
    while True:
        pending = []
        for ka, kb in zip(lines[:-1], lines[1:]):
            xa, za, ga = data[ka]
            xb, zb, gb = data[kb]
            if not (np.all(_circular_distance(xb, za) > _GAP_FRACTION * gb)
                    and np.all(_circular_distance(xa, zb) > _GAP_FRACTION * ga)):
                pending.append((ka, kb))
        if not pending:
            break
        narrow = [(ka, kb) for ka, kb in pending if kb - ka < _MIN_LINE_STEP]
        if narrow or len(lines) + len(pending) > max_lines:
            where = ", ".join(f"[{ka:.6f}, {kb:.6f}]" for ka, kb in (narrow or pending)[:5])
            raise PrescreenError(
                f"Wannier-centre flow not resolved with {len(lines)} lines (limit "
                f"{max_lines}, narrowest step {_MIN_LINE_STEP:g}) between k2 = {where}; "
                "the gap may be nearly closed"
            )
        mids = np.array([0.5 * (ka + kb) for ka, kb in pending])
        wm, gap = centres(mids)  # one call per refinement pass (one DFT run, say)
        min_gap = min(min_gap, gap)
        for mid, w in zip(mids, wm):
            data[float(mid)] = (w,) + _largest_gap(w)
        lines = sorted(data)
    crossings = 0
    for ka, kb in zip(lines[:-1], lines[1:]):
        za, zb = data[ka][1], data[kb][1]
        lo, hi = min(za, zb), max(za, zb)
        crossings += int(np.sum((data[kb][0] > lo) & (data[kb][0] < hi)))
    return Z2Result(
        z2=crossings % 2,
        k2=np.array(lines),
        wcc=np.array([data[k][0] for k in lines]),
        gap_centres=np.array([data[k][1] for k in lines]),
        min_direct_gap=min_gap,
    )


def chern_number(hamiltonian: Hamiltonian, n_occ: int, nk: int = 24) -> int:
    """Chern number of the lowest ``n_occ`` bands by the lattice method.

    Fukui, Hatsugai and Suzuki, J. Phys. Soc. Jpn. 74, 1674 (2005): link variables
    U_mu(k) = det<u(k)|u(k + mu)> / |...| on an nk x nk mesh; the field strength is the
    principal argument of the plaquette product, and the sum over plaquettes / 2 pi is an
    integer for any mesh on which the bands stay gapped.

    Parameters
    ----------
    hamiltonian
        Callable returning periodic Bloch Hamiltonians (see the module notes).
    n_occ
        Number of occupied bands.
    nk
        Mesh divisions along each reciprocal vector.

    Returns
    -------
    int
    """
    f = np.arange(nk) / nk
    g1, g2 = np.meshgrid(f, f, indexing="ij")
    kpts = np.column_stack([g1.ravel(), g2.ravel(), np.zeros(g1.size)])
    u, _ = _occupied_states(hamiltonian, kpts, n_occ)
    u = u.reshape(nk, nk, -1, n_occ)

    def link(axis: int) -> np.ndarray:
        nxt = np.roll(u, -1, axis=axis)
        d = np.linalg.det(u.conj().transpose(0, 1, 3, 2) @ nxt)
        return d / np.abs(d)

    u1, u2 = link(0), link(1)
    plaquette = u1 * np.roll(u2, -1, axis=0) / (np.roll(u1, -1, axis=1) * u2)
    flux = np.angle(plaquette).sum() / (2.0 * np.pi)
    return int(np.rint(flux))
