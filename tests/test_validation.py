"""Tests of prescreen.validation (grouped folds, metrics, cross-validation) and baselines."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from pymatgen.core import Composition

from prescreen.errors import InputError
from prescreen.validation import (
    classification_metrics,
    cross_validate,
    enrichment_factor,
    expected_calibration_error,
    formula_groups,
    grouped_folds,
)

# Real formulas of layered compounds and their relatives, with polymorph spellings
# ("S2Mo", "Mo2S4", "Fe0.5O0.5") and several members of one chemical system (Mo-S, Bi-Se,
# Cr-I, Fe-O) so that a leaky split would be caught.
FORMULAS = [
    "MoS2", "S2Mo", "Mo2S4", "Mo2S3", "MoSe2", "WS2", "WSe2", "WTe2", "MoTe2", "NbSe2",
    "TaS2", "TiS2", "ZrS2", "HfS2", "SnS2", "SnSe", "GeSe", "PtSe2", "PdSe2", "Bi2Se3",
    "BiSe", "Bi2Te3", "Sb2Te3", "CrI3", "CrI2", "VI3", "FeO", "Fe0.5O0.5", "Fe2O3",
    "BN", "C", "Si", "Ge", "Sn", "InSe", "GaS", "GaSe", "In2Se3", "MnBi2Te4", "FeSe",
    "CrGeTe3", "CrSiTe3", "NiPS3", "FePS3", "MnPS3", "RuCl3", "PbI2", "CdI2", "MoSSe",
]


def _keys(formula: str) -> tuple[str, str]:
    """Definitions from pymatgen (the reference library), independent of the module."""
    comp = Composition(formula)
    return comp.reduced_formula, comp.chemical_system


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("n_splits", [3, 5])
def test_grouped_folds_never_share_formula_or_chemsys(seed, n_splits):
    folds = grouped_folds(FORMULAS, n_splits=n_splits, random_state=seed)
    assert len(folds) == n_splits
    seen = np.concatenate([te for _, te in folds])
    np.testing.assert_array_equal(np.sort(seen), np.arange(len(FORMULAS)))  # each row tested once
    for tr, te in folds:
        assert len(np.intersect1d(tr, te)) == 0
        assert len(tr) + len(te) == len(FORMULAS)
        train_keys = [_keys(FORMULAS[i]) for i in tr]
        test_keys = [_keys(FORMULAS[i]) for i in te]
        assert not {k[0] for k in train_keys} & {k[0] for k in test_keys}
        assert not {k[1] for k in train_keys} & {k[1] for k in test_keys}


@pytest.mark.parametrize(
    ("formula", "expected"),
    [("Fe0.5O0.5", "FeO"), ("Mo0.3333S0.6667", "MoS2"), ("Fe2O2", "FeO"), ("Fe0.4O0.6", "Fe2O3")],
)
def test_fractional_formulas_reduce_like_integer_ones(formula, expected):
    # pymatgen itself gives Composition("Fe0.5O0.5").reduced_formula == "Fe0.5O0.5", so the
    # module scales to integers first; the expected value is pymatgen's reduced formula of
    # the integer composition.
    from prescreen.validation import chemistry_keys

    assert chemistry_keys([formula]).loc[0, "reduced_formula"] == Composition(expected).reduced_formula


def test_grouping_by_reduced_formula_only_keeps_polymorphs_together():
    groups = formula_groups(FORMULAS, by=("reduced_formula",))
    by_chemsys = formula_groups(FORMULAS)
    index = {f: i for i, f in enumerate(FORMULAS)}
    assert groups[index["MoS2"]] == groups[index["S2Mo"]] == groups[index["Mo2S4"]]
    assert groups[index["FeO"]] == groups[index["Fe0.5O0.5"]]
    assert groups[index["MoS2"]] != groups[index["Mo2S3"]]  # same chemsys, other formula
    assert by_chemsys[index["MoS2"]] == by_chemsys[index["Mo2S3"]]
    assert by_chemsys.max() < groups.max()
    for tr, te in grouped_folds(FORMULAS, n_splits=4, by=("reduced_formula",), random_state=0):
        assert not {_keys(FORMULAS[i])[0] for i in tr} & {_keys(FORMULAS[i])[0] for i in te}


def test_grouped_folds_are_reproducible_and_stratified():
    y = np.array([f in ("Bi2Se3", "Bi2Te3", "Sb2Te3", "MnBi2Te4", "WTe2", "BiSe", "Sn", "Ge") for f in FORMULAS])
    a = grouped_folds(FORMULAS, n_splits=4, y=y, random_state=7)
    b = grouped_folds(FORMULAS, n_splits=4, y=y, random_state=7)
    for (tr_a, te_a), (tr_b, te_b) in zip(a, b):
        np.testing.assert_array_equal(te_a, te_b)
    assert all(y[te].sum() >= 1 for _, te in a)


@pytest.mark.parametrize(
    ("formulas", "match"),
    [
        (["MoS2", "WSe2", "Xx2"], r"entry 2: .*not a chemical element.*'Xx2'"),
        (["MoS2", "Mo((S2", "WSe2"], r"entry 1: .*'Mo\(\(S2'"),
        (["MoS2", "", "WSe2"], r"entry 1: "),
    ],
)
def test_bad_formula_is_reported_with_its_entry(formulas, match):
    with pytest.raises(InputError, match=match):
        grouped_folds(formulas * 3, n_splits=2)


def test_too_few_rows_per_label_for_stratified_folds():
    formulas = FORMULAS[:12]  # 9 chemistry groups
    y = np.arange(12) % 2  # 6 rows of each label, fewer than the 8 folds asked for
    with pytest.raises(InputError, match=r"cannot make 8 grouped folds.*rows per label \{0: 6, 1: 6\}"):
        grouped_folds(formulas, n_splits=8, y=y)


def test_too_few_groups_for_folds():
    with pytest.raises(InputError, match=r"only 1 chemistry groups .* for 3 folds"):
        grouped_folds(["MoS2", "S2Mo", "Mo2S3"], n_splits=3)


# ---------------------------------------------------------------------------- metrics
@pytest.fixture(scope="module")
def scored():
    rng = np.random.default_rng(0)
    y = (rng.random(500) < 0.2).astype(int)
    p = np.clip(0.2 + 0.4 * (y - 0.2) + 0.25 * rng.standard_normal(500), 0, 1)
    return y, p


def test_metrics_match_scikit_learn(scored):
    from sklearn.metrics import average_precision_score, brier_score_loss, log_loss, roc_auc_score

    y, p = scored
    m = classification_metrics(y, p, k_values=(10, 50))
    assert m["roc_auc"] == pytest.approx(roc_auc_score(y, p), rel=1e-12)
    assert m["pr_auc"] == pytest.approx(average_precision_score(y, p), rel=1e-12)
    assert m["brier"] == pytest.approx(brier_score_loss(y, p), rel=1e-12)
    assert m["log_loss"] == pytest.approx(log_loss(y, np.clip(p, 1e-15, 1 - 1e-15)), rel=1e-9)
    assert m["n"] == 500 and m["n_positive"] == y.sum()
    assert set(m) >= {"ece", "ef@10", "ef@50"}


def test_ece_equals_a_slow_reference(scored):
    y, p = scored
    n_bins = 10
    total = 0.0
    for b in range(n_bins):  # equal-width bins, last one closed
        lo, hi = b / n_bins, (b + 1) / n_bins
        inside = (p >= lo) & ((p < hi) if b < n_bins - 1 else (p <= hi))
        if inside.any():
            total += inside.sum() / len(p) * abs(y[inside].mean() - p[inside].mean())
    assert expected_calibration_error(y, p) == pytest.approx(total, abs=1e-12)


def test_enrichment_factor_follows_its_definition():
    # EF@k = (hits in top k / k) / (hits / n) (Truchon and Bayly, J. Chem. Inf. Model. 2007)
    y = np.array([1, 1, 0, 0, 0, 0, 0, 0, 0, 0])
    perfect = np.linspace(1, 0, 10)
    assert enrichment_factor(y, perfect, 2) == pytest.approx(10 / 2)  # 1 / base rate
    assert enrichment_factor(y, perfect[::-1], 2) == 0.0
    assert enrichment_factor(y, np.full(10, 0.3), 4) == pytest.approx(1.0)  # ties: expected share
    assert np.isnan(enrichment_factor(y, perfect, 11))


def test_metrics_with_one_class_are_nan_not_errors():
    m = classification_metrics(np.zeros(20, dtype=int), np.full(20, 0.1), k_values=(5,))
    assert np.isnan(m["roc_auc"]) and np.isnan(m["pr_auc"]) and np.isnan(m["ef@5"])
    assert m["brier"] == pytest.approx(0.01)


def test_metrics_refuse_bad_probabilities():
    with pytest.raises(InputError, match=r"\[0, 1\].*1\.5"):
        classification_metrics(np.array([0, 1]), np.array([0.2, 1.5]))


# ------------------------------------------------------------------ cross-validation
@pytest.fixture(scope="module")
def cv_table():
    """Features from scikit-learn's generator, one real formula per row (repeated with
    polymorph spellings), labels from the generator."""
    from sklearn.datasets import make_classification

    formulas = [f for f in FORMULAS for _ in range(6)]
    X, y = make_classification(len(formulas), 8, n_informative=4, weights=[0.75, 0.25], random_state=0)
    return X, y, formulas


def test_cross_validate_spillage_classifier(cv_table):
    from prescreen.model import SpillageClassifier

    X, y, formulas = cv_table
    table = cross_validate(
        lambda: SpillageClassifier(n_models=2, n_estimators=15, random_state=0),
        X, y, formulas, n_splits=4, k_values=(10,), random_state=0, progress=False,
    )
    assert list(table.index) == [0, 1, 2, 3, "mean", "std", "pooled"]
    assert table.loc["pooled", "n"] == len(y)
    assert table.loc[[0, 1, 2, 3], "n"].sum() == len(y)
    assert table.loc["mean", "roc_auc"] == pytest.approx(table.loc[[0, 1, 2, 3], "roc_auc"].mean())
    assert table.loc["mean", "roc_auc"] > 0.6
    # an estimator instead of a factory is cloned per fold: the same table
    same = cross_validate(SpillageClassifier(n_models=2, n_estimators=15, random_state=0),
                          X, y, formulas, n_splits=4, k_values=(10,), random_state=0,
                          progress=False)
    pd.testing.assert_frame_equal(same, table)
    with pytest.raises(InputError, match="X and y differ in length"):
        cross_validate(SpillageClassifier(), X[:-3], y, formulas, progress=False)


# -------------------------------------------------------------------------- baselines
def test_element_matrix_uses_atomic_fractions():
    from prescreen.baselines import element_matrix

    m = element_matrix(["MoS2", "Fe0.5O0.5"])
    # atomic numbers Mo 42, S 16, Fe 26, O 8 (periodic table)
    assert m[0, 41] == pytest.approx(1 / 3) and m[0, 15] == pytest.approx(2 / 3)
    assert m[1, 25] == pytest.approx(0.5) and m[1, 7] == pytest.approx(0.5)
    assert m.sum() == pytest.approx(2.0)
    onehot = element_matrix(["MoS2"], encoding="onehot")
    assert onehot.sum() == 2.0


def test_element_linear_rule_learns_an_element_rule():
    from prescreen.baselines import ElementLinearBaseline

    # label defined by a rule in this test: "contains Te"
    y = np.array([int("Te" in Composition(f).as_dict()) for f in FORMULAS])
    model = ElementLinearBaseline(C=10.0).fit(FORMULAS, y)
    p = model.predict_proba(["ZrTe2", "ZrS2", "NbTe2", "NbS2"])[:, 1]
    assert p[0] > p[1] and p[2] > p[3]


def test_simple_baselines():
    from prescreen.baselines import BaseRateBaseline, RandomBaseline

    y = np.array([0, 1, 0, 0])
    assert np.all(BaseRateBaseline().fit(FORMULAS[:4], y).predict_proba(FORMULAS[:7])[:, 1] == 0.25)
    a = RandomBaseline(random_state=3).fit(FORMULAS[:4], y)
    p1, p2 = a.predict_proba(FORMULAS), a.predict_proba(FORMULAS)
    np.testing.assert_array_equal(p1, p2)
    assert p1.shape == (len(FORMULAS), 2) and np.all((p1 >= 0) & (p1 <= 1))


def test_magpie_forest_uses_matminer_features():
    from matminer.featurizers.composition import ElementProperty

    from prescreen.baselines import MagpieForestBaseline, magpie_features

    table = magpie_features(["MoS2", "S2Mo", "WSe2"])
    reference = ElementProperty.from_preset("magpie")
    assert list(table.columns) == reference.feature_labels()
    np.testing.assert_array_equal(table.iloc[2].to_numpy(), np.asarray(reference.featurize(Composition("WSe2")), float))
    np.testing.assert_array_equal(table.iloc[0].to_numpy(), table.iloc[1].to_numpy())
    y = np.array([int("Te" in Composition(f).as_dict()) for f in FORMULAS])
    forest = MagpieForestBaseline(n_estimators=20, random_state=0).fit(FORMULAS, y)
    p = forest.predict_proba(["WTe2", "MoS2"])
    assert p.shape == (2, 2)
    np.testing.assert_array_equal(p, MagpieForestBaseline(n_estimators=20, random_state=0).fit(FORMULAS, y).predict_proba(["WTe2", "MoS2"]))


def test_baselines_refuse_one_class():
    from prescreen.baselines import ElementLinearBaseline

    with pytest.raises(InputError, match="one class"):
        ElementLinearBaseline().fit(FORMULAS[:3], [0, 0, 0])


def test_cross_validate_passes_training_weights_only_to_fit():
    # The weights a recipe is trained with must reach every fold's fit, restricted to the
    # fold's training rows (a weighted recipe is then validated as fitted).
    from prescreen.validation import cross_validate

    seen = []

    class Recorder:
        def fit(self, X, y, sample_weight=None):
            seen.append(np.asarray(sample_weight))
            self.rate_ = float(np.mean(y))
            return self

        def predict_proba(self, X):
            p = np.full(len(X), self.rate_)
            return np.column_stack([1 - p, p])

    # 20 distinct chemical systems (alkali halides), so every row is its own group.
    formulas = [c + a for c in ("Li", "Na", "K", "Rb", "Cs") for a in ("F", "Cl", "Br", "I")]
    y = np.array([0, 1] * 10)
    w = np.arange(20, dtype=float)
    X = np.zeros((20, 1))
    cross_validate(Recorder, X, y, formulas, n_splits=4, random_state=0, progress=False,
                   sample_weight=w)
    assert len(seen) == 4
    assert sorted(np.concatenate(seen).tolist()) == sorted(w.tolist() * 3)
