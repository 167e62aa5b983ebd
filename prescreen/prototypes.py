"""Monolayer prototypes and the decoration rules that fill them with elements.

This module generates the unlabelled candidate pool of ``data_open/``: a set of
hypothetical two-dimensional layers made by placing chemically sensible elements on
the sites of prototype layers that are widely used in the 2D-materials literature
(flat and buckled honeycombs of one and two elements; 2H, 1T and distorted 1T'
MX2 with their Janus MXY forms, the BiTeI-like polar trilayers among them; ordered
two-metal 2H and 1T alloys; CrI3-like MX3 honeycombs; four-atom group-13
monochalcogenides; M2X3 quintuple and MB2X4 septuple layers; puckered one- and
two-element layers; PbO/FeSe-like square nets; capped X-A-B-Y honeycombs; MXenes with
two termination sites).

Geometry rules
--------------
Starting geometries are *guesses*, to be relaxed before any label is computed. Every
bond length is the sum of the two covalent radii of Cordero et al., Dalton Trans.
(2008) 2832, as tabulated in :data:`ase.data.covalent_radii`. Each prototype turns its
bond lengths into a lattice constant and layer heights with ideal coordination
polyhedra (octahedron, trigonal prism, tetrahedron; see each builder). The layer is
centred in a cell whose out-of-plane vector is perpendicular to the layer and
:data:`VACUUM_A` longer than the layer is thick.

Decoration rules
----------------
Each prototype lists its site roles (for example ``M``, ``X``, ``Y``) and the element
groups allowed on each. A decoration is kept when its valence count is sensible:
*ionic* prototypes need an assignment of known oxidation states
(:attr:`pymatgen.core.Element.oxidation_states`) to the cations that balances the
fixed anion charges; *covalent* prototypes (honeycombs, puckered layers,
functionalised honeycombs) follow the octet (8 - N) rule through the group numbers.
Decorations that are mirror images of each other through the layer plane are
generated once.

Identifiers
-----------
``o2d-<code>-<hash>``: ``code`` names the prototype and ``hash`` is the first ten hex
digits of a BLAKE2b digest of the seed, the prototype and the decoration. The scheme
is this project's own; the same seed always gives the same identifiers.
"""

from __future__ import annotations

import hashlib
import itertools
import json
from dataclasses import dataclass, field
from functools import lru_cache
from typing import TYPE_CHECKING, Callable, Iterable, Iterator, Mapping, Sequence

import numpy as np

from prescreen.errors import InputError

if TYPE_CHECKING:  # pragma: no cover - typing only
    import pandas as pd
    from pymatgen.core import Structure

__all__ = [
    "VACUUM_A",
    "DEFAULT_SEED",
    "COVALENT_RADII_SOURCE",
    "Prototype",
    "PoolCandidate",
    "PROTOTYPES",
    "prototype_names",
    "get_prototype",
    "covalent_radius",
    "bond_length",
    "build_structure",
    "decorations",
    "candidate_id",
    "generate_pool",
    "pool_table",
    "structure_from_row",
    "bonded_dimensionality",
    "layer_vacuum",
    "check_intact_monolayer",
    "POOL_COLUMNS",
    "structure_columns",
]

#: Vacuum added to the layer thickness along the out-of-plane axis, in angstrom.
#: 15-20 angstrom is common practice for isolated monolayers; the lower end keeps the
#: real-space grid (and so the DFT cost) small.
VACUUM_A = 15.0

#: Default seed of the pool (sets the identifier namespace and the subset order).
DEFAULT_SEED = 20261202

COVALENT_RADII_SOURCE = (
    "B. Cordero et al., Covalent radii revisited, Dalton Trans. (2008) 2832-2838, "
    "as tabulated in ase.data.covalent_radii"
)

#: Out-of-plane fraction of a bond in a buckled honeycomb (h = f * d). Common practice
#: starting value; silicene (~0.19) and stanene (~0.30) bracket it (from memory).
BUCKLING_FRACTION = 0.30

#: Bond angle (degrees) of the puckered (black-phosphorus-like) layer; phosphorene
#: has about 96 degrees in its zigzag chains (from memory).
PUCKER_ANGLE_DEG = 96.0

#: Smallest height (angstrom) a terminating or capping atom is placed above its
#: hollow site when the bond is shorter than the in-plane distance (common practice).
MIN_HEIGHT_A = 0.8

#: Bonded-network test: two atoms are bonded when closer than this factor times the
#: sum of their covalent radii (common practice for connectivity analysis).
BOND_SCALE = 1.25

#: A relaxed layer that kept less vacuum than this (angstrom) is counted as fallen
#: apart or grown into a bulk (common practice: 8 angstrom decouples periodic images).
MIN_VACUUM_A = 8.0

# --- element groups -------------------------------------------------------------
# Radioactive elements (Tc, Po, At and beyond) and the 4f series are left out.
ALKALINE_EARTH = ("Be", "Mg", "Ca", "Sr", "Ba")
TRANSITION_METALS = (
    "Sc", "Ti", "V", "Cr", "Mn", "Fe", "Co", "Ni", "Cu", "Zn",
    "Y", "Zr", "Nb", "Mo", "Ru", "Rh", "Pd", "Ag", "Cd",
    "La", "Hf", "Ta", "W", "Re", "Os", "Ir", "Pt", "Au", "Hg",
)
GROUP_12 = ("Zn", "Cd", "Hg")
GROUP_13 = ("B", "Al", "Ga", "In", "Tl")
GROUP_14 = ("C", "Si", "Ge", "Sn", "Pb")
GROUP_15 = ("N", "P", "As", "Sb", "Bi")
CHALCOGENS = ("O", "S", "Se", "Te")
HEAVY_CHALCOGENS = ("S", "Se", "Te")
HALOGENS = ("F", "Cl", "Br", "I")
MONOVALENT_CAPS = ("H", "F", "Cl", "Br", "I")
#: Metals allowed on the cation site of ionic prototypes.
METALS = (
    ALKALINE_EARTH
    + TRANSITION_METALS
    + ("Al", "Ga", "In", "Tl", "Ge", "Sn", "Pb", "Sb", "Bi")
)
#: Early transition metals that form MXenes.
MXENE_METALS = ("Sc", "Ti", "V", "Cr", "Mn", "Y", "Zr", "Nb", "Mo", "Hf", "Ta", "W")
MXENE_TERMINATIONS = ("O", "F", "Cl", "Br", "I", "S", "Se", "Te")

#: Fixed formal charges of anions in ionic prototypes (standard valence).
ANION_CHARGE: dict[str, int] = {
    "O": -2, "S": -2, "Se": -2, "Te": -2,
    "F": -1, "Cl": -1, "Br": -1, "I": -1,
    "N": -3, "C": -4,
}

_GROUP_OF: dict[str, int] = {}
for _g, _els in ((2, ALKALINE_EARTH), (12, GROUP_12), (13, GROUP_13), (14, GROUP_14),
                 (15, GROUP_15), (16, CHALCOGENS), (17, HALOGENS)):
    for _e in _els:
        _GROUP_OF[_e] = _g


# --- basic geometry -----------------------------------------------------------------
@lru_cache(maxsize=None)
def covalent_radius(element: str) -> float:
    """Covalent radius of an element in angstrom (Cordero et al. 2008, via ASE).

    Parameters
    ----------
    element
        Chemical symbol, e.g. ``"Mo"``.

    Returns
    -------
    float
        Radius in angstrom.
    """
    from ase.data import atomic_numbers, covalent_radii

    if element not in atomic_numbers:
        raise InputError("unknown chemical symbol", value=element,
                         expected="an element symbol such as 'Mo'")
    return float(covalent_radii[atomic_numbers[element]])


def bond_length(a: str, b: str) -> float:
    """Starting bond length (angstrom): sum of the two covalent radii."""
    return covalent_radius(a) + covalent_radius(b)


_SQRT3 = float(np.sqrt(3.0))


def _hex_lattice(a: float) -> np.ndarray:
    return np.array([[a, 0.0], [-a / 2.0, a * _SQRT3 / 2.0]])


def _layer(
    inplane: np.ndarray, species: Sequence[str], frac_xy: Sequence[Sequence[float]],
    z: Sequence[float],
) -> "Structure":
    """Build a layer from in-plane vectors (2x2, angstrom), fractional xy and heights z.

    The out-of-plane vector is perpendicular to the layer, ``thickness + VACUUM_A``
    long, and the layer is centred at c/2.
    """
    from pymatgen.core import Lattice, Structure

    z_arr = np.asarray(z, dtype=float)
    thickness = float(z_arr.max() - z_arr.min())
    c = thickness + VACUUM_A
    matrix = np.zeros((3, 3))
    matrix[:2, :2] = inplane
    matrix[2, 2] = c
    frac = np.zeros((len(species), 3))
    frac[:, :2] = np.asarray(frac_xy, dtype=float)
    frac[:, 2] = (z_arr - (z_arr.max() + z_arr.min()) / 2.0) / c + 0.5
    return Structure(Lattice(matrix), list(species), frac % 1.0)


def _octahedral_a(d: float) -> tuple[float, float]:
    """Lattice constant and layer half-height of an ideal edge-sharing octahedral layer."""
    return float(np.sqrt(2.0) * d), float(d / _SQRT3)


def _prismatic_a(d: float) -> tuple[float, float]:
    """Lattice constant and half-height of a trigonal-prismatic (2H) layer.

    Uses the 2H-MoS2 shape, half-height / a = 0.49 (from memory: a = 3.16, z = 1.56 A),
    so that d**2 = a**2/3 + (0.49 a)**2.
    """
    a = d / np.sqrt(1.0 / 3.0 + 0.49**2)
    return float(a), float(0.49 * a)


def _cap_height(d: float, a: float) -> float:
    """Height of an atom in a threefold hollow with bond length ``d`` (angstrom)."""
    h2 = d**2 - a**2 / 3.0
    return float(max(np.sqrt(h2) if h2 > 0 else 0.0, MIN_HEIGHT_A))


# --- builders: one per prototype; each takes the decoration mapping ----------------
def _b_honeycomb_flat(d: Mapping[str, str]) -> "Structure":
    a_el, b_el = d["A"], d.get("B", d["A"])
    a = _SQRT3 * bond_length(a_el, b_el)
    return _layer(_hex_lattice(a), [a_el, b_el], [[1 / 3, 2 / 3], [2 / 3, 1 / 3]], [0, 0])


def _b_honeycomb_buckled(d: Mapping[str, str]) -> "Structure":
    a_el, b_el = d["A"], d.get("B", d["A"])
    bond = bond_length(a_el, b_el)
    h = BUCKLING_FRACTION * bond
    a = _SQRT3 * np.sqrt(bond**2 - h**2)
    return _layer(_hex_lattice(a), [a_el, b_el], [[1 / 3, 2 / 3], [2 / 3, 1 / 3]], [h / 2, -h / 2])


def _b_mx2_2h(d: Mapping[str, str]) -> "Structure":
    m, x, y = d["M"], d["X"], d.get("Y", d["X"])
    a, z = _prismatic_a((bond_length(m, x) + bond_length(m, y)) / 2)
    return _layer(_hex_lattice(a), [m, x, y],
                  [[0, 0], [1 / 3, 2 / 3], [1 / 3, 2 / 3]], [0, z, -z])


def _b_mx2_1t(d: Mapping[str, str]) -> "Structure":
    m, x, y = d["M"], d["X"], d.get("Y", d["X"])
    a, _ = _octahedral_a((bond_length(m, x) + bond_length(m, y)) / 2)
    zx, zy = _cap_height(bond_length(m, x), a), _cap_height(bond_length(m, y), a)
    return _layer(_hex_lattice(a), [m, x, y],
                  [[0, 0], [1 / 3, 2 / 3], [2 / 3, 1 / 3]], [0, zx, -zy])


#: Dimerisation of the 1T' metal chains, as a fraction of the rectangular b axis
#: (common practice starting distortion; relaxation sets the final value).
T_PRIME_SHIFT = 0.04


def _b_mx2_1tp(d: Mapping[str, str]) -> "Structure":
    """Distorted 1T' layer in the rectangular (a, sqrt(3) a) cell, 6 atoms."""
    m, x, y = d["M"], d["X"], d.get("Y", d["X"])
    a, _ = _octahedral_a((bond_length(m, x) + bond_length(m, y)) / 2)
    zx, zy = _cap_height(bond_length(m, x), a), _cap_height(bond_length(m, y), a)
    s = T_PRIME_SHIFT
    inplane = np.array([[a, 0.0], [0.0, _SQRT3 * a]])
    frac = [[0, 0 + s], [1 / 2, 1 / 2 - s],          # metals move towards each other
            [0, 1 / 3], [1 / 2, 5 / 6],              # X, top
            [1 / 2, 1 / 6], [0, 2 / 3]]              # Y, bottom
    return _layer(inplane, [m, m, x, x, y, y], frac, [0, 0, zx, zx, -zy, -zy])


def _alloy_builder(stacking: str) -> Callable[[Mapping[str, str]], "Structure"]:
    """Ordered MM'X4 alloy of a 2H or 1T layer in the rectangular (a, sqrt(3) a) cell."""

    def build(d: Mapping[str, str]) -> "Structure":
        m1, m2, x = d["M"], d["N"], d["X"]
        bond = (bond_length(m1, x) + bond_length(m2, x)) / 2
        if stacking == "2H":
            a, z = _prismatic_a(bond)
            bottom = [[0, 1 / 3], [1 / 2, 5 / 6]]
        else:
            a, _ = _octahedral_a(bond)
            z = _cap_height(bond, a)
            bottom = [[1 / 2, 1 / 6], [0, 2 / 3]]
        inplane = np.array([[a, 0.0], [0.0, _SQRT3 * a]])
        frac = [[0, 0], [1 / 2, 1 / 2], [0, 1 / 3], [1 / 2, 5 / 6]] + bottom
        return _layer(inplane, [m1, m2, x, x, x, x], frac, [0, 0, z, z, -z, -z])

    return build


def _b_mx3(d: Mapping[str, str]) -> "Structure":
    """Honeycomb MX3 (CrI3 / BiI3 type): a 1T MX2 layer in the sqrt(3) x sqrt(3) cell
    with one metal in three removed; 8 atoms."""
    one_t = _b_mx2_1t({"M": d["M"], "X": d["X"]})
    cell = one_t.make_supercell([[2, 1, 0], [-1, 1, 0], [0, 0, 1]], in_place=False)
    metals = [i for i, site in enumerate(cell) if site.specie.symbol == d["M"]]
    cell.remove_sites([metals[0]])
    return cell


def _b_mx_gase(d: Mapping[str, str]) -> "Structure":
    """X-M-M'-X' four-atom layer of the group-13 monochalcogenides (GaSe type)."""
    m1, x1, m2, x2 = d["M"], d["X"], d.get("N", d["M"]), d.get("Y", d["X"])
    dmx = (bond_length(m1, x1) + bond_length(m2, x2)) / 2
    a = _SQRT3 * dmx * np.cos(np.radians(30.0))
    zm = bond_length(m1, m2) / 2
    hx1, hx2 = _cap_height(bond_length(m1, x1), a), _cap_height(bond_length(m2, x2), a)
    return _layer(_hex_lattice(a), [m1, m2, x1, x2],
                  [[1 / 3, 2 / 3], [1 / 3, 2 / 3], [2 / 3, 1 / 3], [2 / 3, 1 / 3]],
                  [zm, -zm, zm + hx1, -zm - hx2])


def _b_m2x3_ql(d: Mapping[str, str]) -> "Structure":
    """X-M-X'-M'-X'' quintuple layer (Bi2Se3 type), stacking A-B-C-A-B."""
    x1, m1, xc, m2, x2 = d["X"], d["M"], d["Z"], d.get("N", d["M"]), d.get("Y", d["X"])
    bonds = [bond_length(m1, x1), bond_length(m1, xc), bond_length(m2, xc), bond_length(m2, x2)]
    a, _ = _octahedral_a(float(np.mean(bonds)))
    h = [_cap_height(b, a) for b in bonds]
    z = [h[1] + h[0], h[1], 0.0, -h[2], -h[2] - h[3]]
    frac = [[0, 0], [1 / 3, 2 / 3], [2 / 3, 1 / 3], [0, 0], [1 / 3, 2 / 3]]
    return _layer(_hex_lattice(a), [x1, m1, xc, m2, x2], frac, z)


def _b_septuple(d: Mapping[str, str]) -> "Structure":
    """X-B-X-M-X-B-X septuple layer (MnBi2Te4 type), stacking A-B-C-A-B-C-A."""
    m, b, x = d["M"], d["B"], d["X"]
    dbx, dmx = bond_length(b, x), bond_length(m, x)
    a, _ = _octahedral_a((2 * dbx + dmx) / 3)
    hb, hm = _cap_height(dbx, a), _cap_height(dmx, a)
    z = [hm + 2 * hb, hm + hb, hm, 0.0, -hm, -hm - hb, -hm - 2 * hb]
    stack = [[0, 0], [1 / 3, 2 / 3], [2 / 3, 1 / 3]]
    frac = [stack[(i + 1) % 3] for i in range(7)]
    return _layer(_hex_lattice(a), [x, b, x, m, x, b, x], frac, z)


def _b_puckered(d: Mapping[str, str]) -> "Structure":
    """Puckered layer (black phosphorus type): zigzag along a, armchair along b."""
    a_el, b_el = d["A"], d.get("B", d["A"])
    bond = bond_length(a_el, b_el)
    half = np.radians(PUCKER_ANGLE_DEG / 2.0)
    a = 2 * bond * np.sin(half)
    w = bond * np.cos(half)
    s, h = 0.36 * bond, 0.95 * bond  # phosphorene shape: s/d, h/d (from memory)
    b = 2 * w + 2 * s
    frac = [[0, 0], [1 / 2, w / b], [1 / 2, (w + s) / b], [0, (2 * w + s) / b]]
    return _layer(np.array([[a, 0.0], [0.0, b]]), [a_el, b_el, a_el, b_el], frac,
                  [h / 2, h / 2, -h / 2, -h / 2])


def _b_square(d: Mapping[str, str]) -> "Structure":
    """Square net M2XY of edge-sharing tetrahedra (PbO / FeSe type)."""
    m, x, y = d["M"], d["X"], d.get("Y", d["X"])
    dm = (bond_length(m, x) + bond_length(m, y)) / 2
    a = 2 * dm * np.sqrt(2.0 / 3.0)
    zx = max(np.sqrt(max(bond_length(m, x) ** 2 - a**2 / 4, 0.0)), MIN_HEIGHT_A)
    zy = max(np.sqrt(max(bond_length(m, y) ** 2 - a**2 / 4, 0.0)), MIN_HEIGHT_A)
    frac = [[0, 0], [1 / 2, 1 / 2], [1 / 2, 0], [0, 1 / 2]]
    return _layer(np.array([[a, 0.0], [0.0, a]]), [m, m, x, y], frac, [0, 0, zx, -zy])


def _b_functionalised(d: Mapping[str, str]) -> "Structure":
    """X-A-B-Y: sp3 buckled honeycomb with one monovalent cap per atom (graphane type)."""
    a_el, b_el, x, y = d["A"], d.get("B", d["A"]), d["X"], d.get("Y", d["X"])
    bond = bond_length(a_el, b_el)
    h = bond / 3.0                           # ideal tetrahedron: cos(70.53 deg) = 1/3
    a = _SQRT3 * bond * 2 * np.sqrt(2.0) / 3.0
    z = [h / 2, -h / 2, h / 2 + bond_length(a_el, x), -h / 2 - bond_length(b_el, y)]
    frac = [[1 / 3, 2 / 3], [2 / 3, 1 / 3], [1 / 3, 2 / 3], [2 / 3, 1 / 3]]
    return _layer(_hex_lattice(a), [a_el, b_el, x, y], frac, z)


def _mxene_builder(site: str) -> Callable[[Mapping[str, str]], "Structure"]:
    """T-M-X-M'-T' MXene; terminations above the X atom (``"X"``) or the far metal (``"M"``)."""

    def build(d: Mapping[str, str]) -> "Structure":
        m1, x, m2, t1, t2 = d["M"], d["X"], d.get("N", d["M"]), d["T"], d.get("U", d["T"])
        a, _ = _octahedral_a((bond_length(m1, x) + bond_length(m2, x)) / 2)
        h1, h2 = _cap_height(bond_length(m1, x), a), _cap_height(bond_length(m2, x), a)
        ht1, ht2 = _cap_height(bond_length(m1, t1), a), _cap_height(bond_length(m2, t2), a)
        pos_m1, pos_x, pos_m2 = [1 / 3, 2 / 3], [0, 0], [2 / 3, 1 / 3]
        top, bottom = (pos_x, pos_x) if site == "X" else (pos_m2, pos_m1)
        return _layer(_hex_lattice(a), [t1, m1, x, m2, t2],
                      [top, pos_m1, pos_x, pos_m2, bottom],
                      [h1 + ht1, h1, 0.0, -h2, -h2 - ht2])

    return build


# --- decoration rules -----------------------------------------------------------------
@lru_cache(maxsize=None)
def _oxidation_states(element: str) -> tuple[int, ...]:
    from pymatgen.core import Element

    return tuple(s for s in Element(element).oxidation_states if s > 0)


def _balances(cations: Sequence[str], anions: Sequence[str]) -> bool:
    """True when known positive oxidation states of ``cations`` balance ``anions``."""
    need = -sum(ANION_CHARGE[x] for x in anions)
    choices = [_oxidation_states(c) for c in cations]
    return any(sum(p) == need for p in itertools.product(*choices))


def _octet_pair(a: str, b: str) -> bool:
    """Covalent AB honeycomb rule: isovalent group 14 or 15, or 8 valence electrons."""
    ga, gb = _GROUP_OF.get(a), _GROUP_OF.get(b)
    if ga is None or gb is None:
        return False
    if ga == gb:
        return ga in (14, 15)
    return _valence(ga) + _valence(gb) == 8


def _valence(group: int) -> int:
    """Valence electrons of a main-group element from its group (1-2 and 12-18)."""
    return group - 10 if group > 12 else group if group <= 2 else 2


def _canonical(deco: dict[str, str], flip: Mapping[str, str] | None) -> tuple[tuple[str, str], ...]:
    """Sorted items of a decoration, or of its mirror image when that sorts first."""
    items = tuple(sorted(deco.items()))
    if flip is None:
        return items
    mirrored = {flip.get(k, k): v for k, v in deco.items()}
    return min(items, tuple(sorted(mirrored.items())))


def _d_single(elements: Iterable[str]) -> Iterator[dict[str, str]]:
    for e in elements:
        yield {"A": e}


def _d_binary_honeycomb() -> Iterator[dict[str, str]]:
    pool = GROUP_13 + GROUP_14 + GROUP_15 + CHALCOGENS + GROUP_12 + ALKALINE_EARTH
    for a, b in itertools.combinations(pool, 2):
        if _octet_pair(a, b):
            yield {"A": a, "B": b}


def _d_mx2(metals: Iterable[str], anions: Sequence[str], janus: bool) -> Iterator[dict[str, str]]:
    pairs = itertools.combinations(anions, 2) if janus else ((x, x) for x in anions)
    for x, y in pairs:
        for m in metals:
            if _balances([m], [x, y]):
                yield {"M": m, "X": x, "Y": y} if janus else {"M": m, "X": x}


def _d_alloy() -> Iterator[dict[str, str]]:
    metals = TRANSITION_METALS + ("Ge", "Sn", "Pb")
    for x in _ANIONS:
        for m1, m2 in itertools.combinations(metals, 2):
            if _balances([m1], [x, x]) and _balances([m2], [x, x]):
                yield {"M": m1, "N": m2, "X": x}


def _d_mx3() -> Iterator[dict[str, str]]:
    for x in HALOGENS:
        for m in METALS:
            if _balances([m], [x] * 3):
                yield {"M": m, "X": x}


def _d_gase() -> Iterator[dict[str, str]]:
    metals = ("Al", "Ga", "In", "Tl")
    for m1, m2, x1, x2 in itertools.product(metals, metals, CHALCOGENS, CHALCOGENS):
        yield {"M": m1, "N": m2, "X": x1, "Y": x2}


def _d_ql() -> Iterator[dict[str, str]]:
    metals = ("As", "Sb", "Bi", "Al", "Ga", "In", "Tl")
    for m1, m2 in itertools.product(metals, metals):
        for x1, xc, x2 in itertools.product(CHALCOGENS, CHALCOGENS, CHALCOGENS):
            if _balances([m1, m2], [x1, xc, x2]):
                yield {"X": x1, "M": m1, "Z": xc, "N": m2, "Y": x2}


def _d_septuple() -> Iterator[dict[str, str]]:
    for m, b, x in itertools.product(METALS, ("As", "Sb", "Bi"), HEAVY_CHALCOGENS):
        if m not in ("As", "Sb", "Bi") and _balances([m, b, b], [x] * 4):
            yield {"M": m, "B": b, "X": x}


def _d_puckered_binary() -> Iterator[dict[str, str]]:
    for a, b in itertools.product(("Si", "Ge", "Sn", "Pb"), CHALCOGENS):
        yield {"A": a, "B": b}
    for a, b in itertools.combinations(("P", "As", "Sb", "Bi"), 2):
        yield {"A": a, "B": b}


def _d_square() -> Iterator[dict[str, str]]:
    for x, y in itertools.combinations_with_replacement(CHALCOGENS, 2):
        for m in METALS:
            if _balances([m, m], [x, y]):
                yield {"M": m, "X": x, "Y": y}


def _d_functionalised() -> Iterator[dict[str, str]]:
    pairs = list(itertools.product(GROUP_14, GROUP_14))
    pairs += list(itertools.product(GROUP_13, ("N", "P", "As", "Sb", "Bi")))
    pairs += list(itertools.product(("P", "As", "Sb", "Bi"), ("P", "As", "Sb", "Bi")))
    for (a, b), (x, y) in itertools.product(pairs, itertools.product(MONOVALENT_CAPS, repeat=2)):
        yield {"A": a, "B": b, "X": x, "Y": y}


def _d_mxene() -> Iterator[dict[str, str]]:
    for x in ("C", "N"):
        for m1, m2, t1, t2 in itertools.product(MXENE_METALS, MXENE_METALS,
                                                MXENE_TERMINATIONS, MXENE_TERMINATIONS):
            if _balances([m1, m2], [x, t1, t2]):
                yield {"M": m1, "N": m2, "X": x, "T": t1, "U": t2}


_ANIONS = CHALCOGENS + HALOGENS


# --- prototype table ------------------------------------------------------------------
@dataclass(frozen=True)
class Prototype:
    """A monolayer prototype: site roles, a geometry builder and its decoration rule.

    Attributes
    ----------
    name
        Human-readable name used in the pool's ``prototype`` column, e.g. ``"MX2-2H"``.
    code
        Short lower-case code used inside candidate identifiers.
    n_atoms
        Atoms in the cell.
    description
        One line: structure type and a literature example.
    build
        Function of a decoration mapping (role -> element) returning a pymatgen
        ``Structure`` with the starting geometry.
    rule
        Function returning an iterator of decoration mappings allowed by the rule.
    flip
        Role renaming that maps a decoration onto its mirror image through the layer
        plane (``None`` when no mirror duplicates can arise).
    """

    name: str
    code: str
    n_atoms: int
    description: str
    build: Callable[[Mapping[str, str]], "Structure"] = field(repr=False)
    rule: Callable[[], Iterator[dict[str, str]]] = field(repr=False)
    flip: Mapping[str, str] | None = field(default=None, repr=False)


_FLIP_XY = {"X": "Y", "Y": "X"}
_FLIP_MXENE = {"M": "N", "N": "M", "T": "U", "U": "T"}
_FLIP_GASE = {"M": "N", "N": "M", "X": "Y", "Y": "X"}
_FLIP_AB = {"A": "B", "B": "A", "X": "Y", "Y": "X"}

PROTOTYPES: tuple[Prototype, ...] = (
    Prototype("honeycomb-flat-A2", "hfa", 2, "planar honeycomb, one element (graphene)",
              _b_honeycomb_flat, lambda: _d_single(GROUP_13 + GROUP_14 + GROUP_15)),
    Prototype("honeycomb-buckled-A2", "hba", 2, "buckled honeycomb, one element (silicene, stanene, bismuthene)",
              _b_honeycomb_buckled, lambda: _d_single(GROUP_13[1:] + GROUP_14[1:] + GROUP_15[1:])),
    Prototype("honeycomb-flat-AB", "hfb", 2, "planar binary honeycomb (hexagonal BN)",
              _b_honeycomb_flat, _d_binary_honeycomb),
    Prototype("honeycomb-buckled-AB", "hbb", 2, "buckled binary honeycomb (SiGe, GaAs, ZnO)",
              _b_honeycomb_buckled, _d_binary_honeycomb),
    Prototype("MX2-2H", "m2h", 3, "trigonal-prismatic MX2 (2H-MoS2)",
              _b_mx2_2h, lambda: _d_mx2(METALS, _ANIONS, janus=False)),
    Prototype("MX2-1T", "m1t", 3, "octahedral MX2 (1T-TiS2, CdI2)",
              _b_mx2_1t, lambda: _d_mx2(METALS, _ANIONS, janus=False)),
    Prototype("MX2-1Tprime", "m1d", 6, "distorted octahedral MX2, rectangular cell (1T'-WTe2)",
              _b_mx2_1tp, lambda: _d_mx2(TRANSITION_METALS, HEAVY_CHALCOGENS, janus=False)),
    Prototype("MXY-2H-Janus", "j2h", 3, "Janus trigonal-prismatic MXY (MoSSe)",
              _b_mx2_2h, lambda: _d_mx2(METALS, _ANIONS, janus=True)),
    Prototype("MXY-1T-Janus", "j1t", 3, "Janus octahedral MXY; polar trilayer when M is a pnictogen (BiTeI)",
              _b_mx2_1t, lambda: _d_mx2(METALS, _ANIONS, janus=True)),
    Prototype("MXY-1Tprime-Janus", "j1d", 6, "Janus distorted octahedral MXY, rectangular cell",
              _b_mx2_1tp, lambda: _d_mx2(TRANSITION_METALS, HEAVY_CHALCOGENS, janus=True)),
    Prototype("MMX4-2H-alloy", "a2h", 6, "ordered alloy of two metals in a 2H layer (Mo0.5W0.5S2)",
              _alloy_builder("2H"), _d_alloy),
    Prototype("MMX4-1T-alloy", "a1t", 6, "ordered alloy of two metals in a 1T layer",
              _alloy_builder("1T"), _d_alloy),
    Prototype("MX3-honeycomb", "mx3", 8, "honeycomb of edge-sharing octahedra MX3 (CrI3, BiI3)",
              _b_mx3, _d_mx3),
    Prototype("MX-GaSe", "gas", 4, "X-M-M-X group-13 monochalcogenide (GaSe, InSe, Janus In2SSe)",
              _b_mx_gase, _d_gase, _FLIP_GASE),
    Prototype("M2X3-QL", "m23", 5, "quintuple layer X-M-X-M-X (Bi2Se3, Bi2Te2Se)",
              _b_m2x3_ql, _d_ql, {"X": "Y", "Y": "X", "M": "N", "N": "M"}),
    Prototype("MB2X4-SL", "sl7", 7, "septuple layer X-B-X-M-X-B-X (MnBi2Te4)",
              _b_septuple, _d_septuple),
    Prototype("puckered-A", "pka", 4, "puckered layer, one element (phosphorene)",
              _b_puckered, lambda: _d_single(GROUP_15[1:])),
    Prototype("puckered-AB", "pkb", 4, "puckered binary layer (GeSe, SnS)",
              _b_puckered, _d_puckered_binary),
    Prototype("square-MX", "sqm", 4, "square net of edge-sharing tetrahedra (FeSe, PbO)",
              _b_square, _d_square, _FLIP_XY),
    Prototype("honeycomb-functionalised", "fhc", 4, "X-A-B-Y capped honeycomb (graphane, stanane, BiH)",
              _b_functionalised, _d_functionalised, _FLIP_AB),
    Prototype("MXene-T2-X", "mxx", 5, "M2XT2 MXene, terminations above X (Ti2CO2, W2CO2)",
              _mxene_builder("X"), _d_mxene, _FLIP_MXENE),
    Prototype("MXene-T2-M", "mxm", 5, "M2XT2 MXene, terminations above the far metal",
              _mxene_builder("M"), _d_mxene, _FLIP_MXENE),
)

_BY_NAME = {p.name: p for p in PROTOTYPES}


def prototype_names() -> list[str]:
    """Names of all prototypes, in table order."""
    return [p.name for p in PROTOTYPES]


def get_prototype(name: str) -> Prototype:
    """Look up a prototype by name; raises :class:`InputError` naming the choices."""
    try:
        return _BY_NAME[name]
    except KeyError:
        raise InputError("unknown prototype", value=name,
                         expected="one of " + ", ".join(_BY_NAME)) from None


def decorations(prototype: Prototype | str) -> list[dict[str, str]]:
    """All decorations allowed by a prototype's rule, mirror duplicates removed.

    Parameters
    ----------
    prototype
        A :class:`Prototype` or its name.

    Returns
    -------
    list of dict
        Role -> element mappings in a deterministic order.
    """
    proto = get_prototype(prototype) if isinstance(prototype, str) else prototype
    seen: dict[tuple[tuple[str, str], ...], None] = {}
    for deco in proto.rule():
        seen.setdefault(_canonical(deco, proto.flip), None)
    return [dict(key) for key in seen]


def build_structure(prototype: Prototype | str, decoration: Mapping[str, str]) -> "Structure":
    """Starting geometry of one decorated prototype (pymatgen ``Structure``)."""
    proto = get_prototype(prototype) if isinstance(prototype, str) else prototype
    try:
        return proto.build(decoration)
    except KeyError as exc:
        raise InputError(f"decoration of {proto.name} lacks a site role", value=dict(decoration),
                         expected=f"a mapping with role {exc.args[0]!r}") from exc


def candidate_id(prototype: Prototype | str, decoration: Mapping[str, str], seed: int = DEFAULT_SEED) -> str:
    """Identifier ``o2d-<code>-<10 hex>`` of a decorated prototype under a seed."""
    proto = get_prototype(prototype) if isinstance(prototype, str) else prototype
    key = json.dumps([int(seed), proto.name, sorted(decoration.items())], separators=(",", ":"))
    digest = hashlib.blake2b(key.encode(), digest_size=5).hexdigest()
    return f"o2d-{proto.code}-{digest}"


@dataclass(frozen=True)
class PoolCandidate:
    """One generated monolayer candidate.

    Attributes
    ----------
    id
        Identifier, see :func:`candidate_id`.
    prototype
        Prototype name.
    decoration
        Sorted (role, element) pairs.
    structure
        Starting geometry (pymatgen ``Structure``; lengths in angstrom).
    """

    id: str
    prototype: str
    decoration: tuple[tuple[str, str], ...]
    structure: "Structure" = field(compare=False, repr=False)

    @property
    def reduced_formula(self) -> str:
        return self.structure.composition.reduced_formula

    @property
    def family(self) -> str:
        """Sub-family tag: ``"polar-trilayer"`` for BiTeI-like Janus 1T layers, else the prototype."""
        d = dict(self.decoration)
        if self.prototype == "MXY-1T-Janus" and d["M"] in GROUP_15 and (
            (d["X"] in CHALCOGENS) != (d["Y"] in CHALCOGENS)
        ):
            return "polar-trilayer"
        return self.prototype


def _structure_duplicates(group: list[PoolCandidate]) -> list[PoolCandidate]:
    """Keep the first of each set of candidates that StructureMatcher finds equal."""
    from pymatgen.analysis.structure_matcher import StructureMatcher

    matcher = StructureMatcher(attempt_supercell=False, scale=True)
    kept: list[PoolCandidate] = []
    for cand in group:
        if not any(matcher.fit(cand.structure, k.structure) for k in kept):
            kept.append(cand)
    return kept


def generate_pool(
    seed: int = DEFAULT_SEED,
    prototypes: Sequence[str] | None = None,
    *,
    match_structures: bool = True,
    progress: bool = True,
) -> list[PoolCandidate]:
    """Generate the candidate pool deterministically.

    Parameters
    ----------
    seed
        Identifier namespace (see :func:`candidate_id`).
    prototypes
        Names of the prototypes to use; all when ``None``.
    match_structures
        Compare candidates that share prototype and reduced formula with pymatgen's
        ``StructureMatcher`` and keep one of each set of equal structures.
    progress
        Show a progress bar.

    Returns
    -------
    list of PoolCandidate
        In prototype-table order, then decoration order.
    """
    from tqdm.auto import tqdm

    protos = PROTOTYPES if prototypes is None else tuple(get_prototype(n) for n in prototypes)
    jobs = [(p, d) for p in protos for d in decorations(p)]
    pool: list[PoolCandidate] = []
    for proto, deco in tqdm(jobs, desc="building candidates", disable=not progress, unit="cand"):
        pool.append(PoolCandidate(candidate_id(proto, deco, seed), proto.name,
                                  tuple(sorted(deco.items())), build_structure(proto, deco)))
    if match_structures:
        groups: dict[tuple[str, str], list[PoolCandidate]] = {}
        for cand in pool:
            groups.setdefault((cand.prototype, cand.reduced_formula), []).append(cand)
        keep = set()
        multi = [g for g in groups.values() if len(g) > 1]
        for g in groups.values():
            if len(g) == 1:
                keep.add(g[0].id)
        for g in tqdm(multi, desc="matching structures", disable=not progress, unit="group"):
            keep.update(c.id for c in _structure_duplicates(g))
        pool = [c for c in pool if c.id in keep]
    ids = [c.id for c in pool]
    if len(set(ids)) != len(ids):  # pragma: no cover - a 40-bit hash collision
        raise RuntimeError("candidate identifier collision; change the seed")
    return pool


# --- tables -------------------------------------------------------------------------
#: Columns of the pool table, in order.
POOL_COLUMNS = (
    "id", "prototype", "family", "reduced_formula", "formula", "elements", "n_elements",
    "n_atoms", "decoration", "a_A", "b_A", "gamma_deg", "lattice", "species", "frac_coords",
)


def structure_columns(structure: "Structure") -> dict[str, object]:
    """Geometry columns of a table row: lattice (9 floats, angstrom), species, fractional
    coordinates (3 * n_atoms floats), in-plane lengths (angstrom) and angle (degrees)."""
    lat = structure.lattice
    return {
        "a_A": round(float(lat.a), 6),
        "b_A": round(float(lat.b), 6),
        "gamma_deg": round(float(lat.gamma), 4),
        # full double precision: rounding symmetric positions (1/3 -> 0.33333333) leaves
        # ~1e-8 A noise, enough to upset symmetry finders such as GPAW's
        "lattice": [float(v) for v in lat.matrix.ravel()],
        "species": [site.specie.symbol for site in structure],
        "frac_coords": [float(v) for v in structure.frac_coords.ravel()],
    }


def pool_table(pool: Sequence[PoolCandidate]) -> "pd.DataFrame":
    """One row per candidate with the columns of :data:`POOL_COLUMNS`."""
    import pandas as pd

    rows = []
    for cand in pool:
        comp = cand.structure.composition
        elements = sorted({el.symbol for el in comp.elements})
        rows.append({
            "id": cand.id,
            "prototype": cand.prototype,
            "family": cand.family,
            "reduced_formula": comp.reduced_formula,
            "formula": comp.formula.replace(" ", ""),
            "elements": " ".join(elements),
            "n_elements": len(elements),
            "n_atoms": len(cand.structure),
            "decoration": json.dumps(dict(cand.decoration), sort_keys=True),
            **structure_columns(cand.structure),
        })
    return pd.DataFrame(rows, columns=list(POOL_COLUMNS))


def structure_from_row(row: Mapping[str, object]) -> "Structure":
    """Rebuild a pymatgen ``Structure`` from a table row (see :func:`structure_columns`)."""
    from pymatgen.core import Lattice, Structure

    try:
        matrix = np.asarray(row["lattice"], dtype=float).reshape(3, 3)
        species = [str(s) for s in row["species"]]  # type: ignore[union-attr]
        frac = np.asarray(row["frac_coords"], dtype=float).reshape(len(species), 3)
    except (KeyError, ValueError, TypeError) as exc:
        raise InputError("row does not hold a structure", line=str(row.get("id", "?")),
                         expected="lattice (9 floats), species and frac_coords (3 per atom)") from exc
    return Structure(Lattice(matrix), species, frac)


# --- intactness of a (relaxed) layer ------------------------------------------------
def _bonds(structure: "Structure", bond_scale: float) -> list[tuple[int, int, tuple[int, int, int]]]:
    radii = np.array([covalent_radius(site.specie.symbol) for site in structure])
    cutoff = bond_scale * 2 * float(radii.max())
    centres, neighbours, images, dists = structure.get_neighbor_list(cutoff)
    keep = dists < bond_scale * (radii[centres] + radii[neighbours])
    return [(int(i), int(j), tuple(int(v) for v in np.rint(im)))  # type: ignore[misc]
            for i, j, im in zip(centres[keep], neighbours[keep], images[keep])]


def bonded_dimensionality(structure: "Structure", *, bond_scale: float = BOND_SCALE) -> tuple[int, int]:
    """Number of bonded components and the periodic dimension of the largest one.

    Two atoms are bonded when closer than ``bond_scale`` times the sum of their
    covalent radii. The periodic dimension is the rank of the lattice translations
    that a path of bonds can reach from an atom back to one of its own images
    (0 = molecule, 1 = chain, 2 = layer, 3 = bulk).

    Parameters
    ----------
    structure
        pymatgen ``Structure``.
    bond_scale
        Bond tolerance factor (dimensionless).

    Returns
    -------
    (n_components, dimension)
        Component count over the atoms of the cell and dimension of the largest.
    """
    n = len(structure)
    adjacency: list[list[tuple[int, np.ndarray]]] = [[] for _ in range(n)]
    for i, j, image in _bonds(structure, bond_scale):
        adjacency[i].append((j, np.array(image)))
    offset: list[np.ndarray | None] = [None] * n
    best = (0, 0)
    n_components = 0
    for start in range(n):
        if offset[start] is not None:
            continue
        n_components += 1
        offset[start] = np.zeros(3, dtype=int)
        stack, members, cycles = [start], 1, []
        while stack:
            i = stack.pop()
            for j, image in adjacency[i]:
                reached = offset[i] + image  # type: ignore[operator]
                if offset[j] is None:
                    offset[j] = reached
                    stack.append(j)
                    members += 1
                elif not np.array_equal(offset[j], reached):
                    cycles.append(reached - offset[j])
        dim = int(np.linalg.matrix_rank(np.array(cycles))) if cycles else 0
        best = max(best, (members, dim))
    return n_components, best[1]


def layer_vacuum(structure: "Structure") -> float:
    """Largest empty gap (angstrom) between atomic planes along the layer normal."""
    lat = structure.lattice.matrix
    normal = np.cross(lat[0], lat[1])
    normal /= np.linalg.norm(normal)
    period = abs(float(np.dot(lat[2], normal)))
    heights = np.sort(np.mod(structure.cart_coords @ normal, period))
    gaps = np.diff(np.concatenate([heights, [heights[0] + period]]))
    return float(gaps.max())


def check_intact_monolayer(
    structure: "Structure", *, bond_scale: float = BOND_SCALE, min_vacuum: float = MIN_VACUUM_A,
) -> tuple[bool, str]:
    """Whether a layer is still one bonded sheet, periodic in-plane, with vacuum.

    Returns
    -------
    (ok, reason)
        ``reason`` is empty when ``ok``, else says what failed.
    """
    n_comp, dim = bonded_dimensionality(structure, bond_scale=bond_scale)
    if n_comp != 1:
        return False, f"fell apart into {n_comp} bonded pieces"
    if dim != 2:
        return False, f"bonded network is {dim}-periodic, expected a 2-periodic layer"
    vac = layer_vacuum(structure)
    if vac < min_vacuum:
        return False, f"vacuum gap {vac:.2f} A below {min_vacuum:.1f} A"
    return True, ""
