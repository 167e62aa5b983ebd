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

import numpy as np

from prescreen.errors import InputError
from prescreen.featurise.base import FeatureBatch, FeatureBlock
from prescreen.prototypes import BOND_SCALE, COVALENT_RADII_SOURCE

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
    """Lagrange-Gauss reduction of 2D lattice bases (shortest two independent vectors).

    Parameters
    ----------
    a, b
        ``(3,)`` or ``(B, 3)`` in-plane lattice vectors in angstrom.

    Returns
    -------
    a, b
        Reduced bases, same shapes, with ``|a| <= |b|`` and ``|a.b| <= |a|^2 / 2``.
    """
    single = np.ndim(a) == 1
    a = np.atleast_2d(np.asarray(a, dtype=float)).copy()
    b = np.atleast_2d(np.asarray(b, dtype=float)).copy()
    for _ in range(200):
        swap = (a * a).sum(axis=1) > (b * b).sum(axis=1) + 1e-12
        a[swap], b[swap] = b[swap], a[swap].copy()
        mu = np.rint((a * b).sum(axis=1) / (a * a).sum(axis=1))
        if not mu.any():
            break
        b -= mu[:, None] * a
    return (a[0], b[0]) if single else (a, b)


_EYE3 = np.eye(3)
#: Lattice-vector index pairs spanning the plane for each out-of-plane axis.
_IN_PLANE = np.array([[1, 2], [2, 0], [0, 1]])


def _batch_features(matrix: np.ndarray, frac: np.ndarray, numbers: np.ndarray,
                    axis: int | None) -> tuple[np.ndarray, ...]:
    """Geometry and bonding features of B structures with the same atom count N.

    Parameters
    ----------
    matrix, frac, numbers
        ``(B, 3, 3)`` lattice rows (angstrom), ``(B, N, 3)`` fractional coordinates and
        ``(B, N)`` atomic numbers.
    axis
        Out-of-plane lattice vector index, or ``None`` to detect it per structure.

    Returns
    -------
    values, axes, normals, inverses, placed
        ``(B, len(STRUCTURE_FEATURES))`` with the symmetry columns left NaN, the ``(B,)``
        out-of-plane axis indices, the ``(B, 3)`` unit layer normals, the ``(B, 3, 3)``
        inverse lattice matrices and the ``(B, N, 3)`` fractional coordinates with the
        layer made contiguous (in-plane wrapped into [0, 1), out-of-plane measured from
        the layer's lower edge).
    """
    nb, n, _ = frac.shape
    rows = np.arange(nb)
    inv = np.linalg.inv(matrix)
    widths = 1.0 / np.sqrt((inv**2).sum(axis=1))  # (B, 3) spacing of lattice planes
    f = np.sort(np.mod(frac, 1.0), axis=1)
    gaps = np.diff(np.concatenate([f, f[:, :1] + 1.0], axis=1), axis=1)  # (B, N, 3)
    g = gaps.argmax(axis=1)  # (B, 3)
    if axis is None:
        widest = np.take_along_axis(gaps, g[:, None, :], axis=1)[:, 0, :] * widths
        ax = np.argmax(widest + np.array([0.0, 0.0, 1e-9]), axis=1)  # ties go to c
    else:
        ax = np.full(nb, axis)
    start = f[rows, (g[rows, ax] + 1) % n, ax]
    f_perp = np.mod(frac[rows, :, ax] - start[:, None] + 1e-12, 1.0)  # (B, N)
    i1, i2 = _IN_PLANE[ax, 0], _IN_PLANE[ax, 1]
    va, vb = matrix[rows, i1], matrix[rows, i2]
    normal = np.cross(va, vb)
    area = np.sqrt((normal**2).sum(axis=1))
    normal /= area[:, None]
    spacing = widths[rows, ax]
    heights = f_perp * spacing[:, None]
    thickness = heights.max(axis=1) - heights.min(axis=1)
    vacuum = spacing - thickness
    height_std = np.sqrt(((heights - heights.mean(axis=1, keepdims=True)) ** 2).mean(axis=1))
    same = numbers[:, :, None] == numbers[:, None, :]  # (B, N, N)
    formula_units = np.gcd.reduce(same.sum(axis=2), axis=1)
    ra, rb = reduce_2d_basis(va, vb)
    la, lb = np.sqrt((ra**2).sum(axis=1)), np.sqrt((rb**2).sum(axis=1))
    cosg = np.clip((ra * rb).sum(axis=1) / (la * lb), -1.0, 1.0)
    gamma = np.degrees(np.arccos(np.abs(cosg)))  # min(gamma, 180 - gamma)
    # neighbour search over periodic images, all pairs, numpy over the batch
    radii = _covalent_radii()[numbers]  # (B, N)
    rcut = BOND_SCALE * 2.0 * radii.max(axis=1)
    reach = np.ceil(rcut[:, None] / widths).astype(int)  # (B, 3)
    reach[rows, ax] = np.where(vacuum > rcut, 0, reach[rows, ax])  # nothing bonds across vacuum
    r = reach.max(axis=0)
    images = _images(int(r[0]), int(r[1]), int(r[2]))  # (m, 3) shared by the batch
    # Place every atom in one contiguous layer: in-plane coordinates wrapped into the cell,
    # the out-of-plane one measured from the layer's lower edge. Raw coordinates can split
    # the layer across the cell edge (a layer at z = 0) or hold unwrapped values, and the
    # image search below (no images across the vacuum) would miss those bonds.
    frac = np.mod(frac, 1.0)
    frac[rows, :, ax] = f_perp
    cart = np.einsum("bni,bij->bnj", frac, matrix)
    shifts = np.einsum("mi,bij->bmj", images.astype(float), matrix)  # (B, m, 3)
    disp = (cart[:, None, :, None, :] + shifts[:, None, None, :, :]
            - cart[:, :, None, None, :])  # (B, N, N, m, 3)
    dist = np.sqrt((disp**2).sum(axis=-1))  # (B, N, N, m)
    pair_r = radii[:, :, None] + radii[:, None, :]  # (B, N, N)
    bonded = (dist < BOND_SCALE * pair_r[..., None]) & (dist > 1e-8)
    cn = bonded.sum(axis=(2, 3)).astype(float)  # (B, N)
    count = bonded.sum(axis=(1, 2, 3))
    has = count > 0
    safe = np.maximum(count, 1)
    d_b = np.where(bonded, dist, 0.0)
    mean = d_b.sum(axis=(1, 2, 3)) / safe
    rel = np.where(bonded, dist / pair_r[..., None], 0.0)
    rel_mean = rel.sum(axis=(1, 2, 3)) / safe
    std = np.sqrt((np.where(bonded, (dist - mean[:, None, None, None]) ** 2, 0.0)).sum(axis=(1, 2, 3)) / safe)
    flat = (nb, -1)
    bmin = np.where(bonded, dist, np.inf).reshape(flat).min(axis=1)
    bmax = np.where(bonded, dist, -np.inf).reshape(flat).max(axis=1)
    rmin = np.where(bonded, dist / pair_r[..., None], np.inf).reshape(flat).min(axis=1)
    rmax = rel.reshape(flat).max(axis=1)
    rise = np.abs(np.einsum("bijmk,bk->bijm", disp, normal))
    buckling = np.where(bonded & same[..., None], rise, 0.0).reshape(flat).max(axis=1)
    bond_cols = np.stack([mean, bmin, bmax, std, rel_mean, rmin, rmax], axis=1)
    bond_cols[~has] = np.nan
    nan = np.full(nb, np.nan)
    values = np.column_stack([
        np.full(nb, float(n)), thickness, buckling, height_std, vacuum, area / n,
        area / formula_units, la, lb, gamma, cn.mean(axis=1), cn.min(axis=1), cn.max(axis=1),
        bond_cols, nan, nan, nan,
    ])
    return values, ax, normal, inv, frac


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
    return _features_same_size(np.asarray(matrix, dtype=float)[None],
                               np.asarray(frac, dtype=float)[None],
                               np.asarray(numbers, dtype=np.int64)[None], axis, symprec)[0]


#: Structures per vectorised sub-batch (bounds the (B, N, N, images, 3) work array).
SUB_BATCH = 512


def _features_same_size(matrix: np.ndarray, frac: np.ndarray, numbers: np.ndarray,
                        axis: int | None, symprec: float) -> np.ndarray:
    """Features of B structures with the same atom count, symmetry included."""
    out = []
    for lo in range(0, len(matrix), SUB_BATCH):
        sl = slice(lo, lo + SUB_BATCH)
        m, fr, nu = matrix[sl], frac[sl], numbers[sl]
        values, ax, normal, inv, placed = _batch_features(m, fr, nu, axis)
        # Cartesian images of the layer-plane mirror, one per structure
        mirrors = _EYE3 - 2.0 * normal[:, :, None] * normal[:, None, :]
        for k in range(len(values)):
            values[k, -3:] = _layer_symmetry(m[k], inv[k], placed[k], nu[k], int(ax[k]),
                                             mirrors[k], symprec)
        out.append(values)
    return np.concatenate(out) if out else np.zeros((0, len(STRUCTURE_FEATURES)))


def _layer_symmetry(matrix: np.ndarray, inv: np.ndarray, frac: np.ndarray, numbers: np.ndarray,
                    axis: int, mirror: np.ndarray, symprec: float) -> tuple[float, float, float]:
    """Layer group number, inversion centre present, horizontal mirror present.

    ``inv`` is the inverse of ``matrix`` and ``mirror`` the Cartesian reflection through
    the layer plane."""
    import spglib

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        data = spglib.get_layergroup((matrix, frac, numbers), aperiodic_dir=axis, symprec=symprec)
    if data is None:
        return np.nan, np.nan, np.nan
    rots = np.asarray(data.rotations, dtype=float)  # (s, 3, 3) in the lattice basis
    cart = matrix.T @ rots @ inv.T  # (s, 3, 3) Cartesian; inv.T is the inverse of matrix.T
    has_inv = bool(np.any(np.all(np.abs(cart + _EYE3) < ROTATION_TOL, axis=(1, 2))))
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
    #: 2: atoms placed as one contiguous layer before the bond search and the layer
    #: group (a layer across the cell edge, or unwrapped coordinates, lost bonds in 1).
    version = "2"

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
        groups: dict[int, list[tuple[int, np.ndarray, np.ndarray, np.ndarray]]] = {}
        for i, st in enumerate(batch.structures):
            if st is None:
                continue
            try:
                if not st.is_ordered:
                    raise ValueError("disordered (partially occupied) sites are not supported")
                item = (i, np.asarray(st.lattice.matrix, dtype=float),
                        np.asarray(st.frac_coords, dtype=float),
                        np.asarray(st.atomic_numbers, dtype=np.int64))
                if item[2].shape != (len(item[3]), 3) or len(item[3]) == 0:
                    raise ValueError(f"{len(item[3])} sites with coordinates of shape {item[2].shape}")
                if abs(np.linalg.det(item[1])) < 1e-6:
                    raise ValueError("the lattice vectors are linearly dependent")
            except (ValueError, AttributeError, TypeError) as exc:
                errors[i] = (f"entry {batch.first_row + i}: structure features failed: {exc} "
                             "(expected an ordered periodic pymatgen Structure)")
                continue
            groups.setdefault(len(item[3]), []).append(item)
        for items in groups.values():
            idx = [it[0] for it in items]
            values[idx] = _features_same_size(
                np.stack([it[1] for it in items]), np.stack([it[2] for it in items]),
                np.stack([it[3] for it in items]), self.axis, self.symprec)
        return FeatureBlock(values=values, errors=errors)
