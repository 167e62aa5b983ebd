"""SHAP explanations: additivity against LightGBM's own margins, the scale, one-class models.

The reference for every SHAP check is LightGBM's raw prediction (``raw_score=True``) of
the same boosters: Shapley values of a tree model add up to its margin (local accuracy,
Lundberg et al., Nat. Mach. Intell. 2, 56 (2020)). Features and labels are generated
with scikit-learn's ``make_classification``; no value here is a reference number.
"""

from __future__ import annotations

import copy

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure
from sklearn.datasets import make_classification

from prescreen.errors import InputError
from prescreen.explain import (
    SCALE_LABEL,
    display_name,
    explain,
    feature_unit,
    plot_bar,
    plot_beeswarm,
    plot_dependence,
    plot_waterfall,
)
from prescreen.featurise import default_featurisers
from prescreen.model import SpillageClassifier

#: Names taken from the real feature schema, so the plots show readable labels.
NAMES = ["magpie mean Electronegativity", "struct thickness", "soc p max", "magpie range CovalentRadius",
         "stoich 2-norm", "valence frac d"]
SHAP_ROWS = 12


@pytest.fixture(scope="module")
def data():
    X, y = make_classification(n_samples=90, n_features=len(NAMES), n_informative=3,
                               random_state=3)
    X = pd.DataFrame(X, columns=NAMES, index=[f"c{i}" for i in range(len(X))])
    return X, y


@pytest.fixture(scope="module")
def model(data):
    X, y = data
    return SpillageClassifier(n_models=2, n_estimators=15, min_child_samples=3,
                              random_state=0).fit(X, y)


@pytest.fixture(scope="module")
def explanation(model, data):
    return explain(model, data[0].iloc[:SHAP_ROWS])


def members_margin(model, X) -> np.ndarray:
    """Mean raw margin of the members, from LightGBM's own prediction."""
    return np.mean([b.predict(X.to_numpy(), raw_score=True) for b in model.members_], axis=0)


def test_values_add_up_to_the_ensemble_margin(explanation, model, data):
    X = data[0].iloc[:SHAP_ROWS]
    assert explanation.values.shape == (SHAP_ROWS, len(NAMES))
    np.testing.assert_allclose(explanation.margin(), members_margin(model, X), atol=1e-9)
    np.testing.assert_allclose(explanation.uncalibrated_probability(),
                               1.0 / (1.0 + np.exp(-members_margin(model, X))), atol=1e-12)
    assert explanation.scale == "log-odds"
    assert not explanation.degenerate
    assert explanation.row_ids == tuple(X.index)


def test_ensemble_values_are_the_mean_over_members(explanation, model, data):
    X = data[0].iloc[:SHAP_ROWS]
    singles = [explain(b, X.to_numpy()) for b in model.members_]
    np.testing.assert_allclose(explanation.values, np.mean([s.values for s in singles], axis=0))
    assert explanation.base_value == pytest.approx(np.mean([s.base_value for s in singles]))


def test_column_order_follows_the_model(explanation, model, data):
    X = data[0].iloc[:SHAP_ROWS]
    shuffled = explain(model, X[NAMES[::-1]])
    np.testing.assert_array_equal(shuffled.values, explanation.values)
    assert shuffled.feature_names == tuple(NAMES)


def test_missing_column_is_an_input_error(model, data):
    with pytest.raises(InputError, match="lacks columns"):
        explain(model, data[0].iloc[:3].drop(columns=[NAMES[0]]))


def test_calibrated_probability_is_monotone_in_the_margin(data):
    """With one member the calibrated probability is a monotone map of the SHAP margin."""
    X, y = data
    single = SpillageClassifier(n_models=1, n_estimators=15, min_child_samples=3,
                                calibration="sigmoid", random_state=1).fit(X, y)
    e = explain(single, X)
    order = np.argsort(e.margin(), kind="stable")
    p = single.predict_proba(X)[:, 1][order]
    assert np.all(np.diff(p) >= -1e-12)


def test_one_class_booster_gives_a_degenerate_explanation(data):
    X, _ = data
    booster = lgb.train({"objective": "binary", "verbose": -1, "min_data_in_leaf": 3},
                        lgb.Dataset(X.to_numpy(), label=np.zeros(len(X))), num_boost_round=5)
    e = explain(booster, X.iloc[:4])
    assert e.degenerate
    assert np.all(e.values == 0)
    np.testing.assert_allclose(e.margin(), booster.predict(X.iloc[:4].to_numpy(), raw_score=True))
    assert isinstance(plot_waterfall(e, 0), Figure)
    assert isinstance(plot_bar(e), Figure)


def test_one_class_classifier_is_refused_clearly(model, data):
    broken = copy.deepcopy(model)
    broken.classes_ = np.array([0])
    with pytest.raises(InputError, match="one class"):
        explain(broken, data[0].iloc[:2])


def test_not_a_tree_model_is_refused(data):
    with pytest.raises(InputError, match="cannot explain"):
        explain(object(), data[0])


@pytest.mark.parametrize(
    ("name", "expected"),
    [
        # Magpie table units (from memory): covalent radius in pm, melting point in K.
        ("magpie mean CovalentRadius", "mean covalent radius [pm]"),
        ("magpie maximum MeltingT", "max elemental melting point [K]"),
        ("magpie avg_dev Electronegativity", "mean abs. dev. Pauling electronegativity"),
        ("struct thickness", "layer thickness [Å]"),
        ("soc p max", "max valence p spin-orbit splitting [eV]"),
        ("stoich 3-norm", "stoichiometry L3 norm"),
        ("some new feature", "some new feature"),  # unknown names pass through unchanged
    ],
)
def test_display_names(name, expected):
    assert display_name(name) == expected


def test_every_default_feature_has_a_readable_name():
    names = [n for f in default_featurisers() for n in f.feature_names()]
    raw = [n for n in names if display_name(n) == n]
    assert raw == []
    assert feature_unit("struct area per atom") == "Å²"


def test_plots_are_labelled_in_log_odds(explanation):
    figs = {
        "bar": plot_bar(explanation, max_display=4),
        "beeswarm": plot_beeswarm(explanation, max_display=4),
        "dependence": plot_dependence(explanation, k=3),
        "waterfall": plot_waterfall(explanation, "c2", max_display=3),
    }
    for kind, fig in figs.items():
        labels = " ".join(ax.get_xlabel() + ax.get_ylabel() for ax in fig.axes)
        assert "log-odds" in labels, kind
    assert figs["beeswarm"].axes[0].get_xlabel() == SCALE_LABEL
    dep = [ax for ax in figs["dependence"].axes if ax.get_visible()]
    assert len(dep) == 3
    assert {ax.get_xlabel() for ax in dep} <= set(explanation.display_names)
    # waterfall: 3 features + "other features" bar
    ticks = [t.get_text() for t in figs["waterfall"].axes[0].get_yticklabels()]
    assert len(ticks) == 4 and ticks[-1].endswith("other features")


def test_waterfall_row_errors(explanation):
    with pytest.raises(InputError, match="unknown row ID"):
        plot_waterfall(explanation, "nope")
    with pytest.raises(InputError, match="out of range"):
        plot_waterfall(explanation, 999)


def test_an_integer_label_means_that_row_not_that_position(model, data):
    # A frame sorted or sliced from a larger one keeps integer labels, as after
    # df.sort_values(...).head(): the label wins, as with pandas' .loc.
    X, _ = data
    numbered = X.reset_index(drop=True).iloc[[7, 0, 3]]
    e = explain(model, numbered)
    assert e.row(0) == 1 and e.row(7) == 0 and e.row("3") == 2
    np.testing.assert_allclose(e.data[e.row(0)], numbered.loc[0].to_numpy())
    assert e.row(2) == 2  # no row is labelled 2: read as a position
