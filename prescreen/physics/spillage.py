"""Spin-orbit spillage from eigenvector sets without and with spin-orbit coupling.

The spin-orbit spillage (Liu and Vanderbilt, Phys. Rev. B 90, 125133 (2014)) measures,
at each k, how much of the occupied space of a calculation *with* spin-orbit coupling
(SOC) lies outside the occupied space of the same system *without* it::

    gamma(k) = n_occ(k) - sum_{m, n} |<psi_m(k)|psi~_n(k)>|^2

with m over occupied states without SOC (written as spinors, so each orbital appears
twice) and n over occupied states with SOC. In an insulator whose band order SOC does
not change, gamma stays small; where SOC inverts bands at some k, gamma(k) approaches an
integer, the number of inverted electrons there (one per inverted Kramers partner). A
maximum at or above :data:`SPILLAGE_THRESHOLD` (0.5, common practice) flags a likely
band inversion. It is a strong hint, not a proof: confirm with an invariant
(:mod:`prescreen.physics.z2`).

Occupations and metals
----------------------
Occupations are weights ``w`` in [0, 1] per (spinor) state and k, so that the occupied
projector is ``P = sum_m w_m |psi_m><psi_m|``, and

    gamma(k) = n_occ(k) - Tr(P P~) = n_occ(k) - sum_{m, n} w_m |O_mn|^2 w~_n,
    n_occ(k) = min(Tr P, Tr P~) = min(sum_m w_m, sum_n w~_n).

For an insulator (weights 0 or 1 and the same count with and without SOC) this is the
Liu–Vanderbilt formula. For a metal the weights come from the Fermi level at each k
(:func:`occupations_at_fermi_level`), and then:

* the number of occupied states may differ between the two calculations at a k point
  crossed by a band; taking the smaller count means a state that merely moves across
  the Fermi level (present in one occupied set, absent from the other) adds nothing,
  while occupied weight with SOC that cannot be matched by occupied weight without it
  still counts;
* with a smearing width, weights are fractional and so are n_occ(k) and gamma(k);
  with a step, a state exactly at the Fermi level gets weight 1/2;
* gamma then depends on the Fermi level and the smearing, and states near the Fermi
  level that are degenerate without SOC (and split by it) can add spillage of order
  their weight. Treat values for metals as indicative only.

Using a fixed electron count for a metal instead (the lowest N states at every k)
produces spurious near-integer spillage wherever a band crosses the Fermi level, which
is why the Fermi-level rule is the one offered here.

In every case 0 <= gamma(k) <= n_occ(k) (von Neumann's trace inequality, since all
weights lie in [0, 1]), and gamma is unchanged by any unitary rotation within a set of
states of equal weight (in particular within the occupied subspace of an insulator).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.special import expit

from prescreen import SPILLAGE_THRESHOLD
from prescreen.errors import InputError

__all__ = [
    "SPILLAGE_THRESHOLD",
    "ORTHONORMALITY_TOL",
    "SpillageResult",
    "spillage_from_overlap",
    "spillage_from_eigenvectors",
    "occupations_at_fermi_level",
]

#: Largest allowed deviation (dimensionless) of the Gram matrix of the occupied
#: eigenvectors from the identity. Common practice for double-precision eigensolvers,
#: with a wide margin for eigenvectors read back from single-precision files.
ORTHONORMALITY_TOL: float = 1e-6

#: Tolerance (dimensionless) on occupation weights outside [0, 1] that are still
#: accepted (and clipped): rounding in occupation numbers read from DFT output.
_WEIGHT_TOL: float = 1e-8


@dataclass(frozen=True, eq=False)
class SpillageResult:
    """Spin-orbit spillage on a k-point mesh.

    Attributes
    ----------
    gamma
        Shape (nk,), the spillage gamma(k) at each k point (dimensionless, electrons).
    kpts
        Shape (nk, 3), the k points in fractional (reduced) coordinates of the
        reciprocal lattice vectors.
    n_occ
        Shape (nk,), the occupied count n_occ(k) used at each k; fractional for metals
        with smeared occupations (see the module notes).
    """

    gamma: np.ndarray
    kpts: np.ndarray
    n_occ: np.ndarray

    def __post_init__(self) -> None:
        gamma = np.array(self.gamma, dtype=float)
        kpts = np.array(self.kpts, dtype=float)
        n_occ = np.array(self.n_occ, dtype=float)
        if gamma.ndim != 1 or gamma.size == 0:
            raise InputError(
                "gamma must be a non-empty 1-D array", value=gamma.shape, expected="shape (nk,)"
            )
        nk = gamma.shape[0]
        if kpts.shape != (nk, 3):
            raise InputError(
                "kpts does not match gamma", value=kpts.shape, expected=f"shape ({nk}, 3)"
            )
        if n_occ.shape != (nk,):
            raise InputError(
                "n_occ does not match gamma", value=n_occ.shape, expected=f"shape ({nk},)"
            )
        for name, arr in (("gamma", gamma), ("kpts", kpts), ("n_occ", n_occ)):
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)

    @property
    def argmax(self) -> int:
        """Index of the k point with the largest spillage (the first one on ties)."""
        return int(np.argmax(self.gamma))

    @property
    def max(self) -> float:
        """The largest spillage on the mesh (electrons)."""
        return float(self.gamma[self.argmax])

    @property
    def k_max(self) -> np.ndarray:
        """Shape (3,), fractional coordinates of the k point of the largest spillage."""
        return self.kpts[self.argmax].copy()

    def as_dict(self) -> dict[str, Any]:
        """Return a JSON-friendly dictionary (plain lists and floats)."""
        return {
            "max": self.max,
            "k_max": self.k_max.tolist(),
            "argmax": self.argmax,
            "gamma": self.gamma.tolist(),
            "kpts": self.kpts.tolist(),
            "n_occ": self.n_occ.tolist(),
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "SpillageResult":
        """Rebuild a result from :meth:`as_dict` output (derived keys are ignored)."""
        missing = [key for key in ("gamma", "kpts", "n_occ") if key not in data]
        if missing:
            raise InputError(
                "spillage record lacks keys",
                value=sorted(data),
                expected=f"keys including {missing}",
            )
        return cls(gamma=data["gamma"], kpts=data["kpts"], n_occ=data["n_occ"])


def _as_weights(weights: np.ndarray | None, shape: tuple[int, int], name: str) -> np.ndarray:
    """Validate occupation weights of shape ``shape`` or make all-ones weights."""
    if weights is None:
        return np.ones(shape)
    w = np.asarray(weights, dtype=float)
    if w.shape != shape:
        raise InputError(
            f"{name} has the wrong shape", value=w.shape, expected=f"shape {shape}"
        )
    if not np.all(np.isfinite(w)):
        bad = np.argwhere(~np.isfinite(w))[0]
        raise InputError(
            f"{name} has a non-finite weight",
            line=f"k index {bad[0]}, state {bad[1]}",
            value=float(w[tuple(bad)]),
            expected="a number in [0, 1]",
        )
    outside = (w < -_WEIGHT_TOL) | (w > 1.0 + _WEIGHT_TOL)
    if np.any(outside):
        bad = np.argwhere(outside)[0]
        raise InputError(
            f"{name} has a weight outside [0, 1] (one electron per spinor state)",
            line=f"k index {bad[0]}, state {bad[1]}",
            value=float(w[tuple(bad)]),
            expected="a number in [0, 1]",
        )
    return np.clip(w, 0.0, 1.0)


def _spillage_and_count(
    overlap: np.ndarray,
    weights_nosoc: np.ndarray | None,
    weights_soc: np.ndarray | None,
) -> tuple[np.ndarray, np.ndarray]:
    """Return ``(gamma, n_occ)``, both shape (nk,), after validating the input."""
    o = np.asarray(overlap)
    if o.ndim != 3:
        raise InputError(
            "overlap must be a 3-D array", value=o.shape, expected="shape (nk, m, n)"
        )
    if not np.all(np.isfinite(o)):
        bad = np.argwhere(~np.isfinite(o))[0]
        raise InputError(
            "overlap has a non-finite element",
            line=f"k index {bad[0]}, element ({bad[1]}, {bad[2]})",
            value=complex(o[tuple(bad)]),
            expected="finite complex numbers",
        )
    nk, m, n = o.shape
    w = _as_weights(weights_nosoc, (nk, m), "weights_nosoc")
    wt = _as_weights(weights_soc, (nk, n), "weights_soc")
    weighted = np.einsum("km,kmn,kn->k", w, np.abs(o) ** 2, wt)
    n_occ = np.minimum(w.sum(axis=1), wt.sum(axis=1))
    gamma = n_occ - weighted
    # Rounding can push an exact zero slightly negative; larger deficits mean the
    # states are not orthonormal, which the caller must hear about.
    if np.any(gamma < -1e-6 * np.maximum(n_occ, 1.0)):
        bad = int(np.argmin(gamma))
        raise InputError(
            "spillage came out negative: the overlap rows or columns are not orthonormal",
            line=f"k index {bad}",
            value=float(gamma[bad]),
            expected="overlaps <psi_m|psi~_n> between two orthonormal sets",
        )
    return np.maximum(gamma, 0.0), n_occ


def spillage_from_overlap(
    overlap: np.ndarray,
    weights_nosoc: np.ndarray | None = None,
    weights_soc: np.ndarray | None = None,
) -> np.ndarray:
    """Spillage at each k from the overlap matrix of the two sets of states.

    Parameters
    ----------
    overlap
        Shape (nk, m, n), complex: ``overlap[k, m, n] = <psi_m(k)|psi~_n(k)>``, with m
        over states without SOC (written as spinors) and n over states with SOC. Only
        the states that may be occupied need to be included.
    weights_nosoc, weights_soc
        Shapes (nk, m) and (nk, n): occupations in [0, 1] of each state (one electron
        per spinor state). ``None`` means every state given is fully occupied.

    Returns
    -------
    numpy.ndarray
        Shape (nk,): ``gamma(k) = n_occ(k) - sum_mn w_m |O_mn|^2 w~_n`` with
        ``n_occ(k) = min(sum_m w_m, sum_n w~_n)`` (see the module notes on metals).

    Raises
    ------
    InputError
        On wrong shapes, non-finite values, weights outside [0, 1] or an overlap that
        cannot come from two orthonormal sets (negative spillage).
    """
    gamma, _ = _spillage_and_count(overlap, weights_nosoc, weights_soc)
    return gamma


def _check_orthonormal(psi: np.ndarray, occ: np.ndarray, name: str) -> None:
    """Raise if the states with nonzero weight are not orthonormal at some k."""
    mask = occ > 0.0
    gram = np.einsum("kbm,kbn->kmn", psi.conj(), psi)
    deviation = np.abs(gram - np.eye(psi.shape[2]))
    deviation = np.where(mask[:, :, None] & mask[:, None, :], deviation, 0.0)
    worst = deviation.reshape(psi.shape[0], -1).max(axis=1)
    if np.any(worst > ORTHONORMALITY_TOL):
        bad = int(np.argmax(worst))
        raise InputError(
            f"{name}: the occupied eigenvectors are not orthonormal",
            line=f"k index {bad}",
            value=float(worst[bad]),
            expected=f"|<psi_m|psi_n> - delta_mn| <= {ORTHONORMALITY_TOL}",
        )


def spillage_from_eigenvectors(
    psi_nosoc: np.ndarray,
    psi_soc: np.ndarray,
    occ_nosoc: np.ndarray,
    occ_soc: np.ndarray,
    kpts: np.ndarray,
) -> SpillageResult:
    """Spillage on a mesh from eigenvectors written in one orthonormal basis.

    Parameters
    ----------
    psi_nosoc
        Shape (nk, nbasis, m), complex; column j at k is the j-th eigenvector without
        SOC, written as a spinor in the common basis (each spatial state appears twice,
        once per spin).
    psi_soc
        Shape (nk, nbasis, n), complex; the eigenvectors with SOC in the same basis.
    occ_nosoc, occ_soc
        Shapes (nk, m) and (nk, n): occupations in [0, 1]; e.g. 0/1 for the lowest
        N states of an insulator, or :func:`occupations_at_fermi_level` for a metal.
    kpts
        Shape (nk, 3): fractional coordinates of the k points.

    Returns
    -------
    SpillageResult

    Raises
    ------
    InputError
        On mismatched shapes, bad occupations or occupied states that are not
        orthonormal (within :data:`ORTHONORMALITY_TOL`).
    """
    psi = np.asarray(psi_nosoc)
    psit = np.asarray(psi_soc)
    k = np.asarray(kpts, dtype=float)
    if psi.ndim != 3 or psit.ndim != 3:
        raise InputError(
            "eigenvector arrays must be 3-D",
            value=(psi.shape, psit.shape),
            expected="shapes (nk, nbasis, m) and (nk, nbasis, n)",
        )
    if psi.shape[:2] != psit.shape[:2]:
        raise InputError(
            "psi_nosoc and psi_soc differ in k points or basis size",
            value=(psi.shape, psit.shape),
            expected="the same (nk, nbasis) leading shape",
        )
    nk = psi.shape[0]
    if k.shape != (nk, 3):
        raise InputError("kpts does not match the eigenvectors", value=k.shape,
                         expected=f"shape ({nk}, 3)")
    w = _as_weights(occ_nosoc, (nk, psi.shape[2]), "occ_nosoc")
    wt = _as_weights(occ_soc, (nk, psit.shape[2]), "occ_soc")
    _check_orthonormal(psi, w, "psi_nosoc")
    _check_orthonormal(psit, wt, "psi_soc")
    overlap = np.einsum("kbm,kbn->kmn", psi.conj(), psit)
    gamma, n_occ = _spillage_and_count(overlap, w, wt)
    return SpillageResult(gamma=gamma, kpts=k, n_occ=n_occ)


def occupations_at_fermi_level(
    eigenvalues: np.ndarray, fermi_level: float, width: float = 0.0
) -> np.ndarray:
    """Occupations of each state from a Fermi level, k point by k point.

    Parameters
    ----------
    eigenvalues
        Shape (nk, nstates), energies in eV of spinor states (one electron each).
    fermi_level
        Fermi level in eV (same reference as ``eigenvalues``).
    width
        Fermi–Dirac width k_B T in eV. ``0`` gives a step: 1 below, 0 above and 1/2 for
        a state exactly at the Fermi level.

    Returns
    -------
    numpy.ndarray
        Shape (nk, nstates), weights in [0, 1]. In a metal the number of occupied
        states changes from k to k and, with ``width > 0``, weights near the Fermi
        level are fractional, so n_occ(k) and gamma(k) are not integers; see the module
        notes for what that means for the spillage.

    Raises
    ------
    InputError
        If the eigenvalues are not a finite 2-D array, or the width is negative or not
        finite.
    """
    e = np.asarray(eigenvalues, dtype=float)
    if e.ndim != 2:
        raise InputError("eigenvalues must be a 2-D array", value=e.shape,
                         expected="shape (nk, nstates)")
    if not np.all(np.isfinite(e)):
        raise InputError("eigenvalues contain non-finite values", value="nan or inf",
                         expected="finite energies in eV")
    if not np.isfinite(fermi_level):
        raise InputError("fermi_level is not finite", value=fermi_level,
                         expected="a finite energy in eV")
    if not (np.isfinite(width) and width >= 0.0):
        raise InputError("Fermi–Dirac width must be non-negative", value=width,
                         expected="a width >= 0 eV")
    x = e - float(fermi_level)
    if width == 0.0:
        return np.where(x < 0.0, 1.0, np.where(x > 0.0, 0.0, 0.5))
    return expit(-x / float(width))
