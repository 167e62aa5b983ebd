"""Monolayer structure features: geometry, bonding and layer symmetry of a 2D layer.

The out-of-plane lattice vector is detected as the one across which the atoms leave the
widest empty gap (or given explicitly). All features are invariant under rotation and
translation of the structure, permutation of the atoms and the choice of in-plane cell
(lattice lengths and angle are taken from the Lagrange-Gauss reduced in-plane basis);
intensive features (per atom, per bond, heights, symmetry) are also invariant under
supercells. Bonds are pairs closer than :data:`BOND_SCALE` times the sum of their
covalent radii (Cordero et al. 2008 via ASE), the same criterion as the monolayer check
in :mod:`prescreen.prototypes`. Symmetry is spglib's layer group (A. Togo, K. Shinohara,
I. Tanaka, Sci. Technol. Adv. Mater. Meth. 4, 2384822 (2024); layer groups as in
International Tables for Crystallography Vol. E).

Formula-only rows (no structure) get NaN for every feature: explicitly missing.
"""

from __future__ import annotations

import warnings
from functools import lru_cache
from typing import TYPE_CHECKING

import numpy as np

from prescreen.errors import InputError
from prescreen.featurise.base import FeatureBatch, FeatureBlock
from prescreen.prototypes import BOND_SCALE, COVALENT_RADII_SOURCE

if TYPE_CHECKING:  # pragma: no cover - typing only
    from pymatgen.core import Structure

__all__ = [
    "SYMPREC_A",
    "STRUCTURE_FEATURES",
    "reduce_2d_basis",
    "monolayer_features",
    "MonolayerStructureFeaturiser",
]

#: Symmetry tolerance for spglib in angstrom (pymatgen SpacegroupAnalyzer's default).
SYMPREC_A = 0.01
#: Tolerance (dimensionless) when comparing a Cartesian rotation with -1 or the mirror.
ROTATION_TOL = 1e-6

STRUCTURE_FEATURES: tuple[str, ...] = (
    "struct atoms per cell",
    "struct thickness",
    "struct buckling",
    "struct height std",
    "struct vacuum",
    "struct area per atom",
    "struct area per formula unit",
    "struct lattice a",
    "struct lattice b",
    "struct lattice gamma",
    "struct cn mean",
    "struct cn min",
    "struct cn max",
    "struct bond mean",
    "struct bond min",
    "struct bond max",
    "struct bond std",
    "struct bond rel mean",
    "struct bond rel min",
    "struct bond rel max",
    "struct layer group",
    "struct has inversion",
    "struct has horizontal mirror",
)


@lru_cache(maxsize=1)
def _covalent_radii() -> np.ndarray:
    from ase.data import covalent_radii

    return np.asarray(covalent_radii, dtype=float)


@lru_cache(maxsize=64)
def _images(ra: int, rb: int, rc: int) -> np.ndarray:
    """``(m, 3)`` integer lattice translations within the given reach per axis."""
    ranges = [np.arange(-r, r + 1) for r in (ra, rb, rc)]
    return np.stack(np.meshgrid(*ranges, indexing="ij"), axis=-1).reshape(-1, 3)


def reduce_2d_basis(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Lagrange-Gauss reduction of a 2D lattice basis (shortest two independent vectors).

    Parameters
    ----------
    a, b
        ``(3,)`` in-plane lattice vectors in angstrom.

    Returns
    -------
    a, b
        Reduced basis with ``|a| <= |b|`` and ``|a.b| <= |a|^2 / 2``.
    """
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    if a @ a > b @ b:
        a, b = b, a
    for _ in range(100):
        mu = np.rint((a @ b) / (a @ a))
        b = b - mu * a
        if b @ b >= a @ a:
            break
        a, b = b, a
    return a, b


def _cross(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Cross product of two 3-vectors (cheaper than numpy.cross for single vectors)."""
    return np.array([a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0]])


def _out_of_plane_axis(frac: np.ndarray, widths: np.ndarray) -> tuple[int, np.ndarray]:
    """Axis with the widest empty gap (angstrom across the layer) and the unwrapped coords.

    ``widths`` are the spacings of the lattice planes of each axis (angstrom).
    """
    f = np.sort(np.mod(frac, 1.0), axis=0)  # (N, 3)
    gaps = np.diff(np.concatenate([f, f[:1] + 1.0]), axis=0)  # (N, 3)
    g = gaps.argmax(axis=0)
    widest = gaps[g, np.arange(3)] * widths
    ax = int(np.argmax(widest + np.array([0.0, 0.0, 1e-9])))  # ties go to c
    start = f[(g[ax] + 1) % len(f), ax]
    return ax, np.mod(frac[:, ax] - start + 1e-12, 1.0)


def monolayer_features(
    matrix: np.ndarray,
    frac: np.ndarray,
    numbers: np.ndarray,
    *,
    axis: int | None = None,
    symprec: float = SYMPREC_A,
) -> np.ndarray:
    """Features of one monolayer from its raw cell.

    Parameters
    ----------
    matrix
        ``(3, 3)`` lattice vectors as rows, angstrom.
    frac
        ``(N, 3)`` fractional coordinates.
    numbers
        ``(N,)`` atomic numbers.
    axis
        Index of the out-of-plane lattice vector; ``None`` detects it.
    symprec
        spglib tolerance, angstrom.

    Returns
    -------
    numpy.ndarray
        ``(len(STRUCTURE_FEATURES),)`` in that order; lengths in angstrom, areas in
        angstrom^2, angle in degrees, flags 0/1; NaN where undefined (no bonds, spglib
        failure).
    """
    matrix = np.asarray(matrix, dtype=float)
    frac = np.asarray(frac, dtype=float)
    numbers = np.asarray(numbers, dtype=np.int64)
    n_atoms = len(numbers)
    inv = np.linalg.inv(matrix)
    widths = 1.0 / np.sqrt((inv**2).sum(axis=0))  # spacing of the lattice planes per axis
    if axis is None:
        axis, f_perp = _out_of_plane_axis(frac, widths)
    else:
        one = np.zeros(3)
        one[axis] = 1.0
        _, f_perp = _out_of_plane_axis(frac * one, np.where(one > 0, 1.0, 0.0))
    i1, i2 = [k for k in range(3) if k != axis]
    a, b = matrix[i1], matrix[i2]
    normal = _cross(a, b)
    area = float(np.sqrt(normal @ normal))
    normal /= area
    spacing = float(widths[axis])
    heights = f_perp * spacing
    thickness = float(heights.max() - heights.min())
    vacuum = spacing - thickness
    height_std = float(np.sqrt(((heights - heights.mean()) ** 2).mean()))
    counts = np.bincount(numbers)
    counts = counts[counts > 0]
    formula_units = int(np.gcd.reduce(counts))
    ra, rb = reduce_2d_basis(a, b)
    la, lb = float(np.sqrt(ra @ ra)), float(np.sqrt(rb @ rb))
    gamma = float(np.degrees(np.arccos(min(1.0, max(-1.0, float(ra @ rb) / (la * lb))))))
    gamma = min(gamma, 180.0 - gamma)
    # neighbour search over periodic images (numpy, all pairs)
    radii = _covalent_radii()[numbers]
    rcut = BOND_SCALE * 2.0 * float(radii.max())
    reach = np.ceil(rcut / widths).astype(int)
    if vacuum > rcut:  # no bond can cross the vacuum: skip out-of-plane images
        reach[axis] = 0
    images = _images(int(reach[0]), int(reach[1]), int(reach[2]))
    cart = frac @ matrix
    shifts = images @ matrix  # (m, 3)
    disp = cart[None, :, None, :] + shifts[None, None, :, :] - cart[:, None, None, :]
    dist = np.sqrt((disp**2).sum(axis=-1))  # (N, N, m)
    limit = BOND_SCALE * (radii[:, None] + radii[None, :])  # (N, N)
    bonded = (dist < limit[:, :, None]) & (dist > 1e-8)
    cn = bonded.sum(axis=(1, 2)).astype(float)
    ii, jj, _ = np.nonzero(bonded)
    bonds = dist[bonded]
    if len(bonds):
        rel = bonds / (radii[ii] + radii[jj])
        same = numbers[ii] == numbers[jj]
        rise = np.abs(disp[bonded] @ normal)  # out-of-plane component of each bond
        buckling = float(rise[same].max()) if same.any() else 0.0
        mean = bonds.mean()
        bond_stats = [mean, bonds.min(), bonds.max(), np.sqrt(((bonds - mean) ** 2).mean()),
                      rel.mean(), rel.min(), rel.max()]
    else:
        buckling = 0.0
        bond_stats = [np.nan] * 7
    lg, has_inv, has_mirror = _layer_symmetry(matrix, inv, frac, numbers, axis, normal, symprec)
    return np.array(
        [n_atoms, thickness, buckling, height_std, vacuum, area / n_atoms,
         area / formula_units, la, lb, gamma, cn.mean(), cn.min(), cn.max(),
         *bond_stats, lg, has_inv, has_mirror],
        dtype=float,
    )


def _layer_symmetry(matrix: np.ndarray, inv: np.ndarray, frac: np.ndarray, numbers: np.ndarray, axis: int,
                    normal: np.ndarray, symprec: float) -> tuple[float, float, float]:
    """Layer group number, inversion centre present, horizontal mirror present."""
    import spglib

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        data = spglib.get_layergroup((matrix, frac, numbers), aperiodic_dir=axis, symprec=symprec)
    if data is None:
        return np.nan, np.nan, np.nan
    rots = np.asarray(data.rotations, dtype=float)  # (s, 3, 3) in the lattice basis
    lt = matrix.T
    inv_lt = inv.T  # inverse of the transpose
    cart = lt @ rots @ inv_lt  # (s, 3, 3) Cartesian
    mirror = np.eye(3) - 2.0 * np.outer(normal, normal)
    has_inv = bool(np.any(np.all(np.abs(cart + np.eye(3)) < ROTATION_TOL, axis=(1, 2))))
    has_mirror = bool(np.any(np.all(np.abs(cart - mirror) < ROTATION_TOL, axis=(1, 2))))
    return float(data.number), float(has_inv), float(has_mirror)


class MonolayerStructureFeaturiser:
    """Geometry, bonding and layer-symmetry features of monolayer structures.

    Parameters
    ----------
    axis
        Index (0, 1, 2) of the out-of-plane lattice vector, or ``None`` to detect it.
    symprec
        spglib tolerance in angstrom.
    """

    name = "monolayer_structure"
    version = "1"

    def __init__(self, *, axis: int | None = None, symprec: float = SYMPREC_A) -> None:
        self.axis = axis
        self.symprec = symprec

    def feature_names(self) -> list[str]:
        return list(STRUCTURE_FEATURES)

    def citations(self) -> list[str]:
        return [
            COVALENT_RADII_SOURCE,
            "A. Togo, K. Shinohara, I. Tanaka, Spglib: a software library for crystal "
            "symmetry search, Sci. Technol. Adv. Mater. Meth. 4, 2384822 (2024)",
            "International Tables for Crystallography Vol. E: Subperiodic groups (2010)",
        ]

    def compute(self, batch: FeatureBatch) -> FeatureBlock:
        n = len(batch.structures)
        values = np.full((n, len(STRUCTURE_FEATURES)), np.nan)
        errors = np.full(n, None, dtype=object)
        if self.axis not in (None, 0, 1, 2):
            raise InputError("axis must be 0, 1, 2 or None", value=self.axis,
                             expected="the index of the out-of-plane lattice vector")
        for i, s in enumerate(batch.structures):
            if s is None:
                continue
            try:
                if not s.is_ordered:
                    raise ValueError("disordered (partially occupied) sites are not supported")
                values[i] = monolayer_features(
                    s.lattice.matrix, s.frac_coords, np.array(s.atomic_numbers),
                    axis=self.axis, symprec=self.symprec)
            except (ValueError, np.linalg.LinAlgError, AttributeError, TypeError) as exc:
                errors[i] = (f"entry {batch.first_row + i}: structure features failed: {exc} "
                             "(expected an ordered periodic pymatgen Structure)")
        return FeatureBlock(values=values, errors=errors)
