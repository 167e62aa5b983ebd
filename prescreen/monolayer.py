"""Is a structure an isolated monolayer? Bonded-network dimensionality plus vacuum gap.

The dimensionality of each bonded cluster follows P. M. Larsen, M. Pandey, M. Strange
and K. W. Jacobsen, "Definition of a scoring parameter to identify low-dimensional
materials components", Phys. Rev. Materials 3, 034003 (2019): atoms are bonded when
closer than ``bond_scale`` times the sum of their covalent radii; the bonded graph is
built over periodic images, each connected cluster of the cell is unwrapped along a
spanning tree, and the rank of the lattice translations that map the cluster onto
itself (the cycle vectors of the graph) is its dimensionality (0 molecule, 1 chain,
2 layer, 3 bulk).

For a 2D cluster the layer normal is the reciprocal-lattice direction ``h`` orthogonal
to its two translations; every atom is projected on it (height ``frac . h`` in units
of the interplanar spacing ``d_h``) and the largest empty interval is the vacuum gap.

Status (documented decision):

* ``monolayer`` - exactly one 2D cluster, nothing else in the cell, the cluster's
  translations span the whole in-plane lattice, and a vacuum gap >= ``min_vacuum_A``.
* ``not_2d`` - the largest cluster dimensionality is 3 (bulk), 1 (chains) or 0
  (molecules, clusters), or 2D layers are stacked with gaps below
  :data:`MAX_BULK_GAP_A` (a layered bulk crystal such as 2H-MoS2 or graphite).
* ``ambiguous`` - 2D, but: several stacked 2D layers with vacuum (a multilayer slab,
  not a monolayer), a 2D layer plus detached fragments, interpenetrating layers, layers
  that are not parallel, or a vacuum gap between :data:`MAX_BULK_GAP_A` and
  ``min_vacuum_A`` (borderline). The reason says which.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from prescreen.errors import InputError

__all__ = [
    "BOND_SCALE",
    "MIN_VACUUM_A",
    "MAX_BULK_GAP_A",
    "LayerCheck",
    "bonded_pairs",
    "component_dimensionality",
    "check_monolayer",
]

#: Bonds are pairs closer than this times the sum of covalent radii (dimensionless).
#: Larsen et al. (2019) scan this factor; 1.25 is the value this project adopted after
#: a check on generated monolayers and bulk NaCl, Si and 2H-MoS2 controls (issue 2).
BOND_SCALE: float = 1.25

#: Smallest vacuum gap (A) for an isolated monolayer. Common practice: slab
#: calculations of 2D materials use >= 10 A of vacuum between periodic images.
MIN_VACUUM_A: float = 10.0

#: Largest gap (A) still read as a van der Waals gap of a layered bulk crystal. From
#: memory: interlayer gaps of layered crystals are ~2.5-3.5 A (graphite layer spacing
#: 3.35 A); 5 A leaves margin.
MAX_BULK_GAP_A: float = 5.0


@functools.cache
def _covalent_radii() -> np.ndarray:
    """Covalent radii (A) indexed by atomic number.

    B. Cordero et al., "Covalent radii revisited", Dalton Trans. 2008, 2832, as
    tabulated in ``ase.data.covalent_radii``.
    """
    from ase.data import covalent_radii

    return np.asarray(covalent_radii, dtype=float)


Status = Literal["monolayer", "not_2d", "ambiguous"]


@dataclass(frozen=True)
class LayerCheck:
    """Outcome of :func:`check_monolayer`.

    Attributes
    ----------
    status
        ``"monolayer"``, ``"not_2d"`` or ``"ambiguous"`` (see the module docstring).
    dimensionality
        Largest dimensionality of a bonded cluster (0, 1, 2 or 3).
    n_components
        Number of bonded clusters among the atoms of the cell.
    thickness_A
        Extent of the atoms along the layer normal (A): nucleus to nucleus.
    vacuum_A
        Largest empty gap along the layer normal between periodic images (A).
    axis
        Index (0, 1, 2) of the lattice vector with the largest out-of-plane component.
        For structures without a 2D cluster: the lattice axis with the widest gap.
    reason
        Plain-language explanation of the status.
    normal
        Cartesian unit vector normal to the 2D layer(s), shape (3,); ``None`` when there
        is no 2D cluster.
    """

    status: Status
    dimensionality: int
    n_components: int
    thickness_A: float
    vacuum_A: float
    axis: int
    reason: str
    normal: tuple[float, float, float] | None = None


def _arrays(structure: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Lattice (3, 3) A, Cartesian positions (n, 3) A, atomic numbers (n,), pbc (3,)."""
    if hasattr(structure, "get_atomic_numbers"):  # ASE Atoms
        return (np.asarray(structure.cell[:], float), np.asarray(structure.positions, float),
                np.asarray(structure.get_atomic_numbers(), int), np.ones(3, dtype=np.int64))
    try:
        numbers = np.fromiter((site.specie.Z for site in structure), dtype=int, count=len(structure))
    except AttributeError as exc:  # Site.specie exists only for fully occupied sites
        raise InputError("structure has partially occupied sites", value=structure.composition.formula,
                         expected="an ordered structure") from exc
    return (np.asarray(structure.lattice.matrix, float), np.asarray(structure.cart_coords, float), numbers,
            np.ones(3, dtype=np.int64))


def bonded_pairs(
    lattice: np.ndarray, positions: np.ndarray, numbers: np.ndarray, *, bond_scale: float = BOND_SCALE
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Directed bonds of a periodic structure under the covalent-radius criterion.

    Parameters
    ----------
    lattice
        Lattice vectors as rows, shape (3, 3), A.
    positions
        Cartesian positions, shape (n, 3), A.
    numbers
        Atomic numbers, shape (n,).
    bond_scale
        Bond when distance <= ``bond_scale * (r_i + r_j)``.

    Returns
    -------
    i, j : numpy.ndarray of int, shape (m,)
        Bonded atom indices (each bond appears in both directions).
    images : numpy.ndarray of int, shape (m, 3)
        Lattice translation of atom ``j`` relative to atom ``i``'s cell.
    """
    from pymatgen.optimization.neighbors import find_points_in_spheres

    radii = _covalent_radii()[numbers]
    cutoff = float(2.0 * radii.max() * bond_scale)
    i, j, images, distances = find_points_in_spheres(
        positions, positions, r=cutoff, pbc=np.ones(3, dtype=np.int64), lattice=np.ascontiguousarray(lattice),
        tol=1e-8,
    )
    keep = (distances <= bond_scale * (radii[i] + radii[j])) & (distances > 1e-6)
    return i[keep].astype(np.int64), j[keep].astype(np.int64), np.rint(images[keep]).astype(np.int64)


def component_dimensionality(
    n_atoms: int, i: np.ndarray, j: np.ndarray, images: np.ndarray
) -> tuple[np.ndarray, list[np.ndarray]]:
    """Cluster labels and, per cluster, the integer translations that map it onto itself.

    Parameters
    ----------
    n_atoms
        Number of atoms in the cell.
    i, j, images
        Bonds as returned by :func:`bonded_pairs`.

    Returns
    -------
    labels : numpy.ndarray of int, shape (n_atoms,)
        Cluster index of each atom.
    translations : list of numpy.ndarray of int, each shape (k, 3)
        Distinct non-zero cycle translations (in lattice-vector units) of each cluster;
        the matrix rank of cluster ``c``'s array is its dimensionality.
    """
    # Depth-first walk over the bonds sorted by first atom: a spanning forest that assigns
    # each atom the lattice image it sits in when its cluster is unwrapped.
    order = np.argsort(i, kind="stable")
    starts = np.searchsorted(i[order], np.arange(n_atoms + 1)).tolist()
    targets = j[order].tolist()
    steps = images[order].tolist()
    labels_list = [-1] * n_atoms
    offsets_list: list[list[int]] = [[0, 0, 0]] * n_atoms
    n_comp = 0
    for root in range(n_atoms):
        if labels_list[root] >= 0:
            continue
        labels_list[root] = n_comp
        offsets_list[root] = [0, 0, 0]
        stack = [root]
        while stack:
            u = stack.pop()
            ou = offsets_list[u]
            for e in range(starts[u], starts[u + 1]):
                v = targets[e]
                if labels_list[v] < 0:
                    labels_list[v] = n_comp
                    step = steps[e]
                    offsets_list[v] = [ou[0] + step[0], ou[1] + step[1], ou[2] + step[2]]
                    stack.append(v)
        n_comp += 1
    labels = np.array(labels_list, dtype=np.int64)
    offsets = np.array(offsets_list, dtype=np.int64).reshape(n_atoms, 3)
    cycles = offsets[i] + images - offsets[j]
    translations = []
    edge_labels = labels[i]
    for c in range(n_comp):
        vectors = cycles[(edge_labels == c) & np.any(cycles != 0, axis=1)]
        translations.append(np.unique(vectors, axis=0) if len(vectors) else np.zeros((0, 3), dtype=np.int64))
    return labels, translations


def _rank(vectors: np.ndarray) -> int:
    return int(np.linalg.matrix_rank(vectors.astype(float))) if len(vectors) else 0


def _plane_normal(vectors: np.ndarray) -> tuple[np.ndarray, int]:
    """Primitive integer normal ``h`` of a rank-2 set of translations and the lattice index.

    The index is the gcd of all pairwise cross products: 1 when the translations
    generate every lattice vector of their plane, k > 1 when the cell holds k
    interpenetrating copies of the layer.
    """
    crosses = np.cross(vectors[:, None, :], vectors[None, :, :]).reshape(-1, 3)
    crosses = crosses[np.any(crosses != 0, axis=1)]
    index = int(np.gcd.reduce(np.abs(crosses).ravel()))  # every cross is a multiple of h
    h = crosses[0] // int(np.gcd.reduce(np.abs(crosses[0])))
    if h[np.flatnonzero(h)[0]] < 0:
        h = -h
    return h, index


def _gap(frac: np.ndarray, h: np.ndarray, lattice: np.ndarray) -> tuple[float, float]:
    """(thickness, vacuum) in A along the reciprocal direction ``h`` (integer, shape (3,))."""
    reciprocal = np.linalg.inv(lattice).T  # rows b_k with a_j . b_k = delta_jk
    spacing = 1.0 / float(np.linalg.norm(h @ reciprocal))  # interplanar spacing d_h, A
    heights = np.sort((frac @ h) % 1.0)
    gaps = np.diff(np.concatenate([heights, heights[:1] + 1.0]))
    vacuum = float(gaps.max()) * spacing
    return spacing - vacuum, vacuum


def check_monolayer(
    structure: Any,
    *,
    bond_scale: float = BOND_SCALE,
    min_vacuum_A: float = MIN_VACUUM_A,
    max_bulk_gap_A: float = MAX_BULK_GAP_A,
) -> LayerCheck:
    """Classify a periodic structure as monolayer, not two-dimensional or ambiguous.

    Parameters
    ----------
    structure
        pymatgen ``Structure`` (ordered) or ASE ``Atoms`` with a full cell; treated as
        periodic along all three lattice vectors (the vacuum is part of the cell).
    bond_scale
        Bond cutoff as a multiple of the summed covalent radii.
    min_vacuum_A
        Smallest vacuum gap (A) for ``"monolayer"``.
    max_bulk_gap_A
        Gaps (A) up to this are read as van der Waals gaps of a bulk crystal.

    Returns
    -------
    LayerCheck

    Raises
    ------
    InputError
        For an empty or disordered structure.
    """
    lattice, positions, numbers, _ = _arrays(structure)
    n_atoms = len(numbers)
    if n_atoms == 0:
        raise InputError("structure has no atoms", expected="at least one atom")
    i, j, images = bonded_pairs(lattice, positions, numbers, bond_scale=bond_scale)
    labels, translations = component_dimensionality(n_atoms, i, j, images)
    dims = np.array([_rank(t) for t in translations], dtype=int)
    n_comp = len(dims)
    dim = int(dims.max())
    frac = positions @ np.linalg.inv(lattice)

    if dim != 2:
        best = max(range(3), key=lambda k: _gap(frac, np.eye(3, dtype=np.int64)[k], lattice)[1])
        thickness, vacuum = _gap(frac, np.eye(3, dtype=np.int64)[best], lattice)
        kind = {3: "a 3D network (bulk crystal)", 1: "a 1D chain", 0: "0D (a molecule or cluster)"}[dim]
        return LayerCheck("not_2d", dim, n_comp, thickness, vacuum, best,
                          f"largest bonded cluster is {kind}; no 2D layer")

    layer_ids = np.flatnonzero(dims == 2)
    normals = [_plane_normal(translations[c]) for c in layer_ids]
    h, index = normals[0]
    thickness, vacuum = _gap(frac, h, lattice)
    axis = int(np.argmax(np.abs(h)))
    n_layers = len(layer_ids)
    n_other = n_comp - n_layers

    g = h @ np.linalg.inv(lattice).T
    normal = tuple(float(x) for x in g / np.linalg.norm(g))

    def result(status: Status, reason: str) -> LayerCheck:
        return LayerCheck(status, dim, n_comp, thickness, vacuum, axis, reason, normal)

    if any(not np.array_equal(other, h) for other, _ in normals[1:]):
        return result("ambiguous", f"{n_layers} 2D layers that are not parallel")
    if vacuum < max_bulk_gap_A:
        return result("not_2d", f"{n_layers} 2D layer(s) per cell stacked with gaps of at most "
                                f"{vacuum:.2f} A < {max_bulk_gap_A} A: a layered bulk crystal")
    if n_layers > 1:
        return result("ambiguous", f"multilayer: {n_layers} stacked 2D layers with {vacuum:.2f} A vacuum, "
                                   "not a single monolayer")
    if index > 1:
        return result("ambiguous", f"{index} interpenetrating copies of the layer in the cell")
    if n_other:
        return result("ambiguous", f"2D layer plus {n_other} detached fragment(s) of lower dimensionality")
    if vacuum < min_vacuum_A:
        return result("ambiguous", f"vacuum {vacuum:.2f} A is below {min_vacuum_A} A "
                                   f"(and above the bulk gap limit {max_bulk_gap_A} A)")
    return result("monolayer", f"one 2D layer, {thickness:.2f} A thick, with {vacuum:.2f} A vacuum")
