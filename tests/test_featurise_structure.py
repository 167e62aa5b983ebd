"""Monolayer structure features: invariances, symmetry and bonds against spglib/pymatgen/ASE."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from pymatgen.core import Lattice, Structure

from prescreen.featurise import MonolayerStructureFeaturiser, featurise, parse_formulas
from prescreen.featurise.base import FeatureBatch
from prescreen.featurise.structure import STRUCTURE_FEATURES, reduce_2d_basis
from prescreen.prototypes import BOND_SCALE

DATA = Path(__file__).parent / "data" / "feat_monolayers.json"
NAMES = list(STRUCTURE_FEATURES)
#: Features that describe the cell rather than the layer (change under supercells).
CELL_DEPENDENT = {"struct atoms per cell", "struct lattice a", "struct lattice b", "struct lattice gamma"}


@pytest.fixture(scope="module")
def layers() -> dict[str, Structure]:
    doc = json.loads(DATA.read_text())
    return {k: Structure.from_dict(v) for k, v in doc.items() if not k.startswith("_")}


def feats(*structures: Structure, **kwargs) -> np.ndarray:
    formulas = [s.composition.formula.replace(" ", "") for s in structures]
    batch = FeatureBatch(formulas=formulas, parsed=parse_formulas(formulas), structures=list(structures))
    block = MonolayerStructureFeaturiser(**kwargs).compute(batch)
    assert all(e is None for e in block.errors)
    return block.values


def rotated(s: Structure, seed: int) -> Structure:
    rng = np.random.default_rng(seed)
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    q = q * np.sign(np.diag(r))
    if np.linalg.det(q) < 0:
        q[:, 0] *= -1
    return Structure(Lattice(s.lattice.matrix @ q.T), s.species, s.frac_coords)


def translated(s: Structure, shift) -> Structure:
    return Structure(s.lattice, s.species, s.frac_coords + np.asarray(shift))


def across_the_cell_edge(s: Structure) -> Structure:
    """The layer centred on the out-of-plane cell boundary, coordinates wrapped (as a CIF
    of a layer at z = 0 reads)."""
    return Structure(s.lattice, s.species, s.frac_coords + np.array([0.0, 0.0, 0.5]),
                     to_unit_cell=True)


def unwrapped(s: Structure) -> Structure:
    """Each atom moved by a different whole lattice vector, coordinates left unwrapped."""
    shifts = np.array([[3, -2, 0], [0, 1, 1], [-1, 0, -1]] * len(s))[: len(s)]
    return Structure(s.lattice, s.species, s.frac_coords + shifts)


def permuted(s: Structure, seed: int) -> Structure:
    perm = np.random.default_rng(seed).permutation(len(s))
    return Structure(s.lattice, [s.species[i] for i in perm], s.frac_coords[perm])


def rebased(s: Structure, m) -> Structure:
    """Same crystal, new in-plane basis: rows of ``m`` (unimodular) combine a and b."""
    m = np.asarray(m, dtype=float)
    return Structure(Lattice(m @ s.lattice.matrix), s.species, s.frac_coords @ np.linalg.inv(m))


def vacuum_along_a(s: Structure) -> Structure:
    """Cyclic relabelling of the axes so that the out-of-plane vector is the first one."""
    order = [2, 0, 1]
    return Structure(Lattice(s.lattice.matrix[order]), s.species, s.frac_coords[:, order])


LAYER_NAMES = ["MoS2_2H", "MoS2_1T", "graphene", "silicene", "MoSSe_janus", "hBN"]


@pytest.mark.parametrize("name", LAYER_NAMES)
@pytest.mark.parametrize(
    "transform",
    [
        lambda s: rotated(s, 1),
        lambda s: rotated(s, 2),
        lambda s: translated(s, [0.31, -0.7, 0.23]),
        lambda s: permuted(s, 3),
        lambda s: rebased(s, [[1, 1, 0], [0, 1, 0], [0, 0, 1]]),
        lambda s: rebased(s, [[2, 1, 0], [1, 1, 0], [0, 0, 1]]),
        lambda s: rebased(s, [[0, 1, 0], [-1, 0, 0], [0, 0, 1]]),
        vacuum_along_a,
        across_the_cell_edge,
        unwrapped,
    ],
    ids=["rotate1", "rotate2", "translate", "permute", "a+b", "2a+b,a+b", "swap", "axis-a",
         "across-edge", "unwrapped"],
)
def test_invariant_under_rotation_translation_permutation_and_cell_choice(layers, name, transform):
    s = layers[name]
    np.testing.assert_allclose(feats(transform(s))[0], feats(s)[0], rtol=1e-7, atol=1e-7)


@pytest.mark.parametrize("name", LAYER_NAMES)
@pytest.mark.parametrize("scale", [(2, 1, 1), (2, 3, 1)])
def test_intensive_features_invariant_under_supercells(layers, name, scale):
    s = layers[name]
    base, big = feats(s)[0], feats(s * scale)[0]
    keep = [i for i, n in enumerate(NAMES) if n not in CELL_DEPENDENT]
    np.testing.assert_allclose(big[keep], base[keep], rtol=1e-7, atol=1e-7)
    assert big[NAMES.index("struct atoms per cell")] == len(s) * scale[0] * scale[1]


@pytest.mark.parametrize(
    ("name", "layer_group", "inversion", "mirror"),
    # Layer groups (International Tables for Crystallography Vol. E), from memory:
    # 2H-MoS2 and h-BN p-6m2 (No. 78): sigma_h, no inversion; 1T-MoS2 and buckled
    # silicene p-3m1 (No. 72): inversion, no sigma_h; graphene p6/mmm (No. 80): both;
    # Janus MoSSe p3m1 (No. 69): neither.
    [
        ("MoS2_2H", 78, 0, 1),
        ("hBN", 78, 0, 1),
        ("MoS2_1T", 72, 1, 0),
        ("silicene", 72, 1, 0),
        ("graphene", 80, 1, 1),
        ("MoSSe_janus", 69, 0, 0),
    ],
)
def test_layer_group_and_symmetry_flags(layers, name, layer_group, inversion, mirror):
    row = dict(zip(NAMES, feats(layers[name])[0]))
    assert row["struct layer group"] == layer_group
    assert row["struct has inversion"] == inversion
    assert row["struct has horizontal mirror"] == mirror


@pytest.mark.parametrize("name", LAYER_NAMES)
def test_bonds_equal_pymatgen_neighbour_list(layers, name):
    from ase.data import covalent_radii

    s = layers[name]
    radii = covalent_radii[np.array(s.atomic_numbers)]
    centre, point, _, dist = s.get_neighbor_list(r=BOND_SCALE * 2 * radii.max() + 0.01)
    ok = (dist < BOND_SCALE * (radii[centre] + radii[point])) & (dist > 1e-8)
    cn = np.bincount(centre[ok], minlength=len(s))
    bonds = dist[ok]
    rel = bonds / (radii[centre[ok]] + radii[point[ok]])
    row = dict(zip(NAMES, feats(s)[0]))
    expected = {
        "struct cn mean": cn.mean(), "struct cn min": cn.min(), "struct cn max": cn.max(),
        "struct bond mean": bonds.mean(), "struct bond min": bonds.min(),
        "struct bond max": bonds.max(), "struct bond std": bonds.std(),
        "struct bond rel mean": rel.mean(), "struct bond rel min": rel.min(),
        "struct bond rel max": rel.max(),
    }
    for key, value in expected.items():
        assert row[key] == pytest.approx(value, rel=1e-9), key


@pytest.mark.parametrize("name", LAYER_NAMES)
def test_geometry_equals_ase(layers, name):
    from pymatgen.io.ase import AseAtomsAdaptor

    s = layers[name]
    atoms = AseAtomsAdaptor.get_atoms(s)
    cell = atoms.cell.array
    z = atoms.positions[:, 2]
    area = np.linalg.norm(np.cross(cell[0], cell[1]))
    row = dict(zip(NAMES, feats(s)[0]))
    assert row["struct thickness"] == pytest.approx(np.ptp(z))
    assert row["struct vacuum"] == pytest.approx(cell[2, 2] - np.ptp(z))
    assert row["struct area per atom"] == pytest.approx(area / len(atoms))
    assert row["struct height std"] == pytest.approx(np.std(z))
    assert row["struct lattice a"] == pytest.approx(atoms.cell.lengths()[0])
    assert row["struct lattice gamma"] == pytest.approx(60.0)  # hexagonal, reduced


def test_buckling(layers):
    rows = {n: dict(zip(NAMES, feats(layers[n])[0])) for n in ("graphene", "silicene", "MoS2_2H")}
    assert rows["graphene"]["struct buckling"] == pytest.approx(0.0, abs=1e-9)
    # by construction of the fixture: Si sublattices at +-0.22 angstrom
    assert rows["silicene"]["struct buckling"] == pytest.approx(0.44)
    assert rows["MoS2_2H"]["struct buckling"] == pytest.approx(0.0, abs=1e-9)  # no S-S or Mo-Mo rise


def test_explicit_axis_equals_detected(layers):
    s = layers["MoS2_1T"]
    np.testing.assert_allclose(feats(s, axis=2), feats(s))
    np.testing.assert_allclose(feats(vacuum_along_a(s), axis=0), feats(s), atol=1e-7)


@pytest.mark.parametrize("seed", range(5))
def test_reduce_2d_basis_equals_pymatgen_niggli(seed):
    # with a long perpendicular c, the two shortest Niggli vectors are the reduced 2D basis
    rng = np.random.default_rng(seed)
    a0, b0 = np.append(rng.uniform(2, 5, 2), 0.0), np.append(rng.uniform(2, 5, 2), 0.0)
    m = np.array([[3, 2, 0], [4, 3, 0], [0, 0, 1]], dtype=float)  # unimodular skew
    a1, b1 = m[0, 0] * a0 + m[0, 1] * b0, m[1, 0] * a0 + m[1, 1] * b0
    a, b = reduce_2d_basis(a1, b1)
    niggli = Lattice(np.array([a1, b1, [0, 0, 40.0]])).get_niggli_reduced_lattice()
    ref = sorted(niggli.abc)[:2]
    assert [np.linalg.norm(a), np.linalg.norm(b)] == pytest.approx(ref, rel=1e-9)


def test_formula_only_rows_are_missing_and_bad_structures_reported(layers):
    disordered = layers["MoS2_2H"].copy()
    disordered.replace(0, {"Mo": 0.5, "W": 0.5})
    frame = featurise(["Bi2Se3", "MoS2", "MoWS4"], [None, layers["MoS2_2H"], disordered],
                      progress=False)
    assert frame[NAMES].iloc[0].isna().all() and frame["error"][0] is None
    assert frame[NAMES].iloc[1].notna().all()
    assert "disordered" in frame["error"][2] and "entry 2" in frame["error"][2]
    assert frame[NAMES].iloc[2].isna().all() and np.isfinite(frame["magpie mean Number"][2])


def test_blank_formula_taken_from_structure(layers):
    frame = featurise(["", "MoS2"], [layers["MoS2_2H"]] * 2, progress=False)
    row0 = frame.drop(columns="error").iloc[0].to_numpy()
    row1 = frame.drop(columns="error").iloc[1].to_numpy()
    np.testing.assert_allclose(row0, row1)


def test_ase_atoms_compositions_missing_structures_and_the_callers_index(layers):
    # What a notebook hands over: a pandas Series of formulas after a join (NaN where no
    # structure), an ase.Atoms, a pymatgen Composition.
    import pandas as pd
    from pymatgen.core import Composition
    from pymatgen.io.ase import AseAtomsAdaptor

    s = layers["MoS2_2H"]
    formulas = pd.Series(["MoS2", "MoS2", "Bi2Te3", Composition("WSe2")], index=list("abcd"))
    structures = [s, AseAtomsAdaptor.get_atoms(s), np.nan, None]
    out = featurise(formulas, structures, progress=False)
    assert list(out.index) == list("abcd") and out["error"].isna().all()
    cols = [c for c in out.columns if c.startswith("struct")]
    np.testing.assert_allclose(out.loc["b", cols].to_numpy(float),
                               out.loc["a", cols].to_numpy(float), atol=1e-9)  # Atoms = Structure
    assert out.loc[["c", "d"], cols].isna().all().all()  # formula-only rows: missing, not failed
    reference = featurise(["WSe2"], progress=False)
    np.testing.assert_allclose(out.loc["d"].drop("error").to_numpy(float),
                               reference.iloc[0].drop("error").to_numpy(float), equal_nan=True)
