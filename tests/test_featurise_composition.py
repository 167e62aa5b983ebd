"""Composition features against matminer (the reference library) and pymatgen.

Reference: matminer 0.10.1 featurisers ElementProperty.from_preset("magpie"),
Stoichiometry, ValenceOrbital, IonProperty and PropertyStats, which implement
L. Ward et al., npj Comput. Mater. 2, 16028 (2016); pymatgen's Composition for parsing.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from prescreen.errors import InputError
from prescreen.featurise import (
    IonicCharacterFeaturiser,
    MagpieFeaturiser,
    StoichiometryFeaturiser,
    ValenceOrbitalFeaturiser,
    featurise,
    parse_formulas,
    parse_one,
    schema_version,
)
from prescreen.featurise import base as base_mod
from prescreen.featurise.composition import MAGPIE_PROPERTIES, magpie_table

pytest.importorskip("matminer")

#: Elements H..Pu (the matminer magpie tables cover them; heavier ones are imputed).
SYMBOLS = (
    "H He Li Be B C N O F Ne Na Mg Al Si P S Cl Ar K Ca Sc Ti V Cr Mn Fe Co Ni Cu Zn Ga Ge "
    "As Se Br Kr Rb Sr Y Zr Nb Mo Tc Ru Rh Pd Ag Cd In Sn Sb Te I Xe Cs Ba La Ce Pr Nd Pm "
    "Sm Eu Gd Tb Dy Ho Er Tm Yb Lu Hf Ta W Re Os Ir Pt Au Hg Tl Pb Bi Po At Rn Fr Ra Ac Th "
    "Pa U Np Pu"
).split()
AMOUNTS = ("", "2", "3", "0.5", "1.25", "7", "0.1", "4", "", "13", "2.75", "1")


def varied_formulas(n: int) -> list[str]:
    """Deterministic, varied formulas: 1-5 distinct elements, integer and decimal amounts,
    plus some with parentheses and repeated elements (no invented reference numbers)."""
    out = []
    for i in range(n):
        k = 1 + i % 5
        els = [SYMBOLS[(7 * i + 13 * j) % len(SYMBOLS)] for j in range(k)]
        parts = [e + AMOUNTS[(i + 5 * j) % len(AMOUNTS)] for j, e in enumerate(els)]
        if i % 17 == 0 and k >= 3:
            parts = [parts[0], "(" + "".join(parts[1:3]) + ")2"] + parts[3:]
        if i % 23 == 0:
            parts.append(els[0])  # repeated element, summed like pymatgen does
        out.append("".join(parts))
    return out


FORMULAS = varied_formulas(1000)


def _batch(formulas):
    from prescreen.featurise.base import FeatureBatch

    return FeatureBatch(formulas=formulas, parsed=parse_formulas(formulas),
                        structures=[None] * len(formulas))


@pytest.fixture(scope="module")
def magpie_reference():
    from matminer.featurizers.composition import ElementProperty
    from pymatgen.core import Composition

    ep = ElementProperty.from_preset("magpie")
    return ep, np.array([ep.featurize(Composition(f)) for f in FORMULAS])


def test_magpie_equals_matminer_on_1000_formulas(magpie_reference):
    ep, ref = magpie_reference
    ours = MagpieFeaturiser().compute(_batch(FORMULAS)).values
    assert ours.shape == ref.shape == (1000, 132)
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-9)
    # same order and meaning of the columns as matminer's labels
    assert [n.removeprefix("magpie ") for n in MagpieFeaturiser().feature_names()] == [
        lab.removeprefix("MagpieData ") for lab in ep.feature_labels()]


def test_magpie_table_equals_matminer_magpiedata():
    from matminer.utils.data import MagpieData
    from pymatgen.core import Element

    data = MagpieData(impute_nan=True)
    table = magpie_table()
    for j, prop in enumerate(MAGPIE_PROPERTIES):
        ref = [data.get_elemental_property(Element.from_Z(z), prop) for z in range(1, 119)]
        np.testing.assert_array_equal(table[1:, j], ref, err_msg=prop)


def test_stoichiometry_and_valence_equal_matminer():
    from matminer.featurizers.composition import Stoichiometry, ValenceOrbital
    from pymatgen.core import Composition

    sub = FORMULAS[:300]  # matminer's Stoichiometry is slow on decimals: fewer formulas there
    st = StoichiometryFeaturiser().compute(_batch(sub[:80])).values
    vo = ValenceOrbitalFeaturiser().compute(_batch(sub)).values
    ref_stoich, ref_valence = Stoichiometry(), ValenceOrbital(props=("frac",))
    with warnings.catch_warnings():  # pymatgen warns about noble gases without Pauling X
        warnings.simplefilter("ignore", UserWarning)
        ref_st = np.array([ref_stoich.featurize(Composition(f)) for f in sub[:80]])
    ref_vo = np.array([ref_valence.featurize(Composition(f)) for f in sub])
    np.testing.assert_allclose(st, ref_st, rtol=0, atol=1e-9)
    np.testing.assert_allclose(vo, ref_vo, rtol=0, atol=1e-9)


class _MagpieX:
    """matminer data source giving Magpie's Pauling electronegativity as property "X"."""

    def __init__(self):
        from matminer.utils.data import MagpieData

        self.data = MagpieData()

    def get_elemental_properties(self, elems, name):
        assert name == "X"
        return [self.data.get_elemental_property(e, "Electronegativity") for e in elems]

    def get_oxidation_states(self, elem):
        return self.data.get_oxidation_states(elem)


def test_ionic_character_equals_matminer_ionproperty():
    from matminer.featurizers.composition import IonProperty
    from pymatgen.core import Composition

    sub = FORMULAS[:200]
    ours = IonicCharacterFeaturiser().compute(_batch(sub)).values
    ip = IonProperty(data_source=_MagpieX(), fast=True)
    src = _MagpieX()
    for f, row in zip(sub, ours):
        comp = Composition(f)
        _, max_char, avg_char = ip.featurize(comp)
        els, fr = zip(*comp.element_composition.items())
        # population std with fraction weights (numpy); matminer's PropertyStats.std_dev
        # applies a reliability-weight correction that depends on how the formula is
        # scaled (FeO vs Fe2O2), so it is deliberately not mirrored
        x = src.get_elemental_properties(els, "X")
        std = np.sqrt(np.cov(x, aweights=fr, bias=True)) if len(x) > 1 else 0.0
        np.testing.assert_allclose(row, [max_char, avg_char, std], rtol=0, atol=1e-9, err_msg=f)


@pytest.mark.parametrize("featuriser", [MagpieFeaturiser(), StoichiometryFeaturiser(),
                                        ValenceOrbitalFeaturiser(), IonicCharacterFeaturiser()])
def test_invariant_to_formula_scaling(featuriser):
    # Ward et al. 2016: composition features depend on fractions only (FeO = Fe2O2 = Fe0.5O0.5)
    vals = featuriser.compute(_batch(["FeO", "Fe2O2", "Fe0.5O0.5", "OFe"])).values
    for row in vals[1:]:
        np.testing.assert_allclose(row, vals[0], rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize(
    ("formula", "pymatgen_formula"),
    [("Ca(OH)2", None), ("[Fe(CN)6]K3", None), ("CH3COOH", None), ("Mg3(PO4)2", None),
     ("Bi2Se3", None), ("Fe0.5O0.5", None), ("(MoS2)3", None), ("{Al2O3}", None),
     # pymatgen has no hydrate notation: compare with the summed parts
     ("CuSO4·5H2O", ("CuSO4", 5, "H2O")), ("Na2CO3*10H2O", ("Na2CO3", 10, "H2O"))],
)
def test_parser_matches_pymatgen(formula, pymatgen_formula):
    from pymatgen.core import Composition

    if pymatgen_formula is None:
        ref = Composition(formula)
    else:
        ref = Composition(pymatgen_formula[0]) + pymatgen_formula[1] * Composition(pymatgen_formula[2])
    ours = parse_one(formula)
    assert ours == pytest.approx({str(k): v for k, v in ref.get_el_amt_dict().items()})
    batch = parse_formulas([formula])
    assert batch.errors[0] is None
    assert dict(zip(batch.z[0][batch.z[0] > 0], batch.amount[0][batch.z[0] > 0])) == pytest.approx(
        {el.Z: v for el, v in ref.items()})


@pytest.mark.parametrize(
    ("formula", "match"),
    [
        ("XxO2", r"unknown element symbol 'Xx'.*got 'XxO2'"),
        ("Ca(OH2", r"unclosed bracket '\('"),
        ("CaOH)2", r"unbalanced bracket '\)'"),
        ("", "formula is empty"),
        ("Fe0O", "amount of Fe is not positive"),
        ("Mo$S2", r"unexpected character '\$'"),
        ("mos2", "unexpected character 'm'"),
        ("Fe()", "empty brackets"),
        ("5", "number '5' does not follow an element"),
        ("CuSO4··H2O", "empty part in a hydrate formula"),
    ],
)
def test_bad_formulas_are_refused_with_the_value(formula, match):
    with pytest.raises(InputError, match=match):
        parse_one(formula, line=7)


def test_batch_keeps_every_row_and_names_the_bad_entry():
    frame = featurise(["MoS2", "XxO", "Bi2Se3", 42, None], progress=False)
    assert len(frame) == 5
    assert "entry 4: formula is missing" in frame["error"][4]
    assert frame["error"][0] is None and frame["error"][2] is None
    assert "entry 1" in frame["error"][1] and "'XxO'" in frame["error"][1]
    assert "entry 3" in frame["error"][3] and "text" in frame["error"][3]
    assert frame.drop(columns="error").iloc[1].isna().all()
    assert np.isfinite(frame["magpie mean Number"][[0, 2]]).all()


def test_runner_parallel_equals_serial(monkeypatch):
    monkeypatch.setattr(base_mod, "CHUNK_ROWS", 50)
    formulas = FORMULAS[:180] + ["XxO"]
    serial = featurise(formulas, progress=False)
    parallel = featurise(formulas, progress=False, n_jobs=2)
    assert serial.equals(parallel)
    assert serial["error"].notna().sum() == 1


def test_runner_input_checks():
    with pytest.raises(InputError, match="differ in length"):
        featurise(["MoS2"], [None, None], progress=False)
    with pytest.raises(InputError, match="n_jobs"):
        featurise(["MoS2"], progress=False, n_jobs=0)


def test_schema_version_changes_with_any_definition():
    base = schema_version()
    assert len(base) == 64 and base == schema_version()

    class Changed(StoichiometryFeaturiser):
        version = "2"

    class Renamed(StoichiometryFeaturiser):
        def feature_names(self):
            return [n + " v2" for n in super().feature_names()]

    default = base_mod.default_featurisers()
    for swap in (Changed(), Renamed(), StoichiometryFeaturiser(p_list=(0, 2, 3))):
        feats = [swap if isinstance(f, StoichiometryFeaturiser) else f for f in default]
        assert schema_version(feats) != base
    assert schema_version(default[::-1]) != base


def test_every_featuriser_has_names_and_citations():
    for f in base_mod.default_featurisers():
        assert isinstance(f, base_mod.Featuriser)
        assert f.feature_names() and f.citations()


def test_featurise_candidates_indexes_by_id():
    from prescreen.candidate import Candidate
    from prescreen.featurise import featurise_candidates

    cands = [Candidate(id="a", formula="MoS2", source="x.csv:2"),
             Candidate(id="b", formula="Bi2Se3", source="x.csv:3")]
    frame = featurise_candidates(cands, progress=False)
    assert list(frame.index) == ["a", "b"]
    expected = featurise(["MoS2", "Bi2Se3"], progress=False)
    np.testing.assert_array_equal(frame.drop(columns="error").to_numpy(),
                                  expected.drop(columns="error").to_numpy())
