"""Tests of prescreen.model: the scikit-learn contract, calibration, model files."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.utils.estimator_checks import parametrize_with_checks

from prescreen.model import SpillageClassifier, SpillageRegressor


def _expected_failed_checks(estimator):
    if isinstance(estimator, SpillageRegressor):
        return {
            "check_sample_weight_equivalence_on_dense_data": (
                "row bagging and LightGBM's min_data_in_leaf count rows, not weight"
            ),
        }
    return {
        "check_sample_weight_equivalence_on_dense_data": (
            "a weight of 2 is not the same as a duplicated row here: row bagging, the "
            "calibration folds and LightGBM's min_data_in_leaf all count rows, not weight"
        ),
        "check_class_weight_classifiers": (
            "by design class weights only shape the trees; the calibrator is refitted to "
            "the unweighted labels, so a weight of 1000:0.0001 does not move predict()"
        ),
    }


@parametrize_with_checks(
    [
        SpillageClassifier(n_models=2, n_estimators=8, calibration_cv=3, random_state=0),
        SpillageRegressor(n_models=2, n_estimators=60, learning_rate=0.2, random_state=0),
    ],
    expected_failed_checks=_expected_failed_checks,
)
def test_sklearn_contract(estimator, check):
    check(estimator)


# ------------------------------------------------------------------------ helpers
def _noisy_imbalanced(n: int, *, seed: int = 1):
    """scikit-learn generated data: 10 % positives, 5 % flipped labels, weak separation.

    Trees grown with balanced class weights on such data over-predict the positive class,
    so the raw probability is miscalibrated (asserted in the test, not assumed).
    """
    from sklearn.datasets import make_classification

    return make_classification(
        n_samples=n, n_features=10, n_informative=3, weights=[0.9, 0.1], flip_y=0.05, class_sep=0.5, random_state=seed
    )


SMALL = dict(n_models=3, n_estimators=30, random_state=0)


@pytest.fixture(scope="module")
def split_data():
    X, y = _noisy_imbalanced(3000)
    return X[:1000], y[:1000], X[1000:], y[1000:]


@pytest.fixture(scope="module")
def raw_brier(split_data):
    from sklearn.metrics import brier_score_loss

    Xtr, ytr, Xte, yte = split_data
    raw = SpillageClassifier(calibration=None, **SMALL).fit(Xtr, ytr)
    p = raw.predict_proba(Xte)[:, 1]
    # precondition: the uncalibrated model really is miscalibrated (mean far above base rate)
    assert p.mean() > 2 * yte.mean()
    return brier_score_loss(yte, p)


@pytest.mark.parametrize("method", ["sigmoid", "isotonic", "auto"])
def test_calibration_lowers_held_out_brier(split_data, raw_brier, method):
    from sklearn.metrics import brier_score_loss

    Xtr, ytr, Xte, yte = split_data
    model = SpillageClassifier(calibration=method, **SMALL).fit(Xtr, ytr)
    calibrated = brier_score_loss(yte, model.predict_proba(Xte)[:, 1])
    assert calibrated < 0.8 * raw_brier
    assert model.calibration_method_ in ("sigmoid", "isotonic")


def test_auto_uses_platt_with_few_positives():
    from prescreen.model import ISOTONIC_MIN_POSITIVES

    X, y = _noisy_imbalanced(400, seed=3)
    assert y.sum() < ISOTONIC_MIN_POSITIVES  # precondition of the rule
    model = SpillageClassifier(calibration="auto", **SMALL).fit(X, y)
    assert model.calibration_method_ == "sigmoid"
    assert set(model.calibration_scores_) == {"sigmoid", "isotonic"}


def test_ensemble_outputs_agree(split_data):
    Xtr, ytr, Xte, _ = split_data
    model = SpillageClassifier(calibration="sigmoid", **SMALL).fit(Xtr, ytr)
    members = model.ensemble_proba(Xte)
    mean, std = model.predict_uncertainty(Xte)
    proba = model.predict_proba(Xte)
    assert members.shape == (3, len(Xte))
    assert len(model.members_) == len(model.calibrators_) == 3
    np.testing.assert_array_equal(mean, proba[:, 1])
    np.testing.assert_allclose(std, members.std(axis=0))
    assert np.all((members >= 0) & (members <= 1))
    assert np.median(std) > 0  # the seeds really differ


def test_same_seed_same_model_any_n_jobs_other_seed_differs(split_data):
    Xtr, ytr, Xte, _ = split_data
    a = SpillageClassifier(**SMALL).fit(Xtr, ytr).ensemble_proba(Xte)
    b = SpillageClassifier(**SMALL).fit(Xtr, ytr).ensemble_proba(Xte)
    c = SpillageClassifier(**(SMALL | {"random_state": 1})).fit(Xtr, ytr).ensemble_proba(Xte)
    threaded = SpillageClassifier(**SMALL, n_jobs=2).fit(Xtr, ytr).ensemble_proba(Xte)
    np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(a, threaded)  # n_jobs does not change the model
    assert not np.array_equal(a, c)


def test_missing_features_are_accepted(split_data):
    Xtr, ytr, Xte, _ = split_data
    Xtr = Xtr.copy()
    Xtr[::7, 2] = np.nan
    model = SpillageClassifier(**SMALL).fit(Xtr, ytr)
    Xte = Xte.copy()
    Xte[:, 2] = np.nan
    assert np.all(np.isfinite(model.predict_proba(Xte)))


def test_grouped_calibration_needs_two_groups(split_data):
    from prescreen.errors import InputError

    Xtr, ytr, _, _ = split_data
    SpillageClassifier(**SMALL).fit(Xtr, ytr, groups=np.arange(len(ytr)) % 7)
    with pytest.raises(InputError, match="at least 2 groups"):
        SpillageClassifier(**SMALL).fit(Xtr, ytr, groups=np.zeros(len(ytr)))


@pytest.mark.parametrize("labels", [[0] * 12, [1] * 12])
def test_one_class_is_refused(labels):
    from prescreen.errors import InputError

    X = np.random.default_rng(0).random((12, 3))
    with pytest.raises(InputError, match=r"cannot train on one class.*\[" + str(labels[0]) + r"\]"):
        SpillageClassifier(**SMALL).fit(X, labels)


# -------------------------------------------------------------------- model files
@pytest.fixture(scope="module")
def magpie_names():
    """Real feature names (with spaces) from matminer's magpie preset."""
    from matminer.featurizers.composition import ElementProperty

    return ElementProperty.from_preset("magpie").feature_labels()[:10]


@pytest.mark.parametrize("calibration", ["sigmoid", "isotonic", None])
def test_model_file_round_trips_bit_for_bit(tmp_path, split_data, magpie_names, calibration):
    import pandas as pd

    from prescreen.model import training_data_hash

    Xtr, ytr, Xte, _ = split_data
    frame = pd.DataFrame(Xtr, columns=magpie_names)
    model = SpillageClassifier(calibration=calibration, **SMALL).fit(frame, ytr)
    meta = dict(
        feature_schema="test-schema-1",
        training_data_hash=training_data_hash(frame, ytr),
        metrics={"roc_auc": 0.5},
        threshold=0.5,
    )
    model.save(tmp_path / "a", **meta)
    loaded = SpillageClassifier.load(tmp_path / "a", expected_schema="test-schema-1")
    loaded.save(tmp_path / "b", **meta)
    files_a = sorted(p.name for p in (tmp_path / "a").iterdir())
    assert files_a == sorted(p.name for p in (tmp_path / "b").iterdir())
    assert "metadata.json" in files_a and "member_00.txt" in files_a
    for name in files_a:
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name
    test_frame = pd.DataFrame(Xte, columns=magpie_names)
    np.testing.assert_array_equal(model.ensemble_proba(test_frame), loaded.ensemble_proba(test_frame))
    assert list(loaded.feature_names_in_) == list(magpie_names)
    assert loaded.get_params() == model.get_params()


def test_model_file_is_json_and_text(tmp_path, split_data):
    import json

    Xtr, ytr, _, _ = split_data
    SpillageClassifier(**SMALL).fit(Xtr, ytr).save(tmp_path, feature_schema="s1", threshold=0.5)
    meta = json.loads((tmp_path / "metadata.json").read_text())
    for key in ("feature_schema_sha256", "package_versions", "training_data_hash", "metrics", "threshold", "calibrators"):
        assert key in meta
    assert meta["package_versions"]["lightgbm"]
    assert (tmp_path / "member_00.txt").read_text().startswith("tree")  # LightGBM's text format


def test_schema_mismatch_names_both_schemas_and_file(tmp_path, split_data):
    from prescreen.errors import SchemaMismatchError

    Xtr, ytr, _, _ = split_data
    SpillageClassifier(**SMALL).fit(Xtr, ytr).save(tmp_path / "m", feature_schema="comp-v1")
    with pytest.raises(SchemaMismatchError, match=r"m/metadata\.json.*'comp-v1'.*'comp-v2'"):
        SpillageClassifier.load(tmp_path / "m", expected_schema="comp-v2")


def test_tampered_member_is_refused(tmp_path, split_data):
    from prescreen.errors import InputError

    Xtr, ytr, _, _ = split_data
    SpillageClassifier(**SMALL).fit(Xtr, ytr).save(tmp_path, feature_schema="s1")
    member = tmp_path / "member_01.txt"
    member.write_bytes(member.read_bytes().replace(b"leaf_value=", b"leaf_value=1", 1))
    with pytest.raises(InputError, match=r"member_01\.txt: .*checksum"):
        SpillageClassifier.load(tmp_path)


def test_wrong_columns_at_predict_time(split_data, magpie_names):
    import pandas as pd

    Xtr, ytr, Xte, _ = split_data
    model = SpillageClassifier(**SMALL).fit(pd.DataFrame(Xtr, columns=magpie_names), ytr)
    with pytest.raises(ValueError, match="feature names"):
        model.predict_proba(pd.DataFrame(Xte, columns=magpie_names[::-1]))


def test_saving_a_smaller_model_removes_old_members(tmp_path, split_data):
    Xtr, ytr, Xte, _ = split_data
    SpillageClassifier(**SMALL).fit(Xtr, ytr).save(tmp_path, feature_schema="s1")
    small = SpillageClassifier(**(SMALL | {"n_models": 2})).fit(Xtr, ytr)
    small.save(tmp_path, feature_schema="s1")
    assert sorted(p.name for p in tmp_path.glob("member_*.txt")) == ["member_00.txt", "member_01.txt"]
    np.testing.assert_array_equal(SpillageClassifier.load(tmp_path).predict_proba(Xte), small.predict_proba(Xte))


# ------------------------------------------------------------------ regression head
def test_regressor_round_trip_and_spread(tmp_path):
    from sklearn.datasets import make_regression

    X, y = make_regression(n_samples=600, n_features=8, noise=5.0, random_state=0)
    model = SpillageRegressor(n_models=3, n_estimators=40, random_state=0).fit(X[:400], y[:400])
    mean, std = model.predict_uncertainty(X[400:])
    np.testing.assert_array_equal(mean, model.predict(X[400:]))
    assert model.ensemble_predict(X[400:]).shape == (3, 200) and np.median(std) > 0
    assert model.score(X[400:], y[400:]) > 0.5  # R^2 on held-out generated data
    model.save(tmp_path / "a", feature_schema="s1")
    loaded = SpillageRegressor.load(tmp_path / "a", expected_schema="s1")
    loaded.save(tmp_path / "b", feature_schema="s1")
    for name in ("metadata.json", "member_00.txt", "member_02.txt"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()
    np.testing.assert_array_equal(loaded.predict(X[400:]), mean)


def test_loading_the_wrong_kind_of_model(tmp_path, split_data):
    from prescreen.errors import InputError

    Xtr, ytr, _, _ = split_data
    SpillageClassifier(**SMALL).fit(Xtr, ytr).save(tmp_path, feature_schema="s1")
    with pytest.raises(InputError, match=r"metadata\.json: the model file holds another kind.*SpillageClassifier"):
        SpillageRegressor.load(tmp_path)


def test_calibration_folds_keep_groups_apart(split_data):
    _, ytr, _, _ = split_data
    groups = np.arange(len(ytr)) % 37
    folds = SpillageClassifier(**SMALL)._calibration_folds(
        ytr, np.ones(len(ytr)), groups, 5, np.random.default_rng(0)
    )
    assert len(folds) == 5
    for tr, te in folds:
        assert not set(groups[tr]) & set(groups[te])


def test_training_data_hash_tracks_the_data(split_data):
    from prescreen.model import training_data_hash

    Xtr, ytr, _, _ = split_data
    h = training_data_hash(Xtr, ytr)
    assert h == training_data_hash(Xtr.copy(), ytr.copy()) and h.startswith("sha256:")
    changed = Xtr.copy()
    changed[3, 2] += 1e-12
    assert training_data_hash(changed, ytr) != h
    assert training_data_hash(Xtr, 1 - ytr) != h


def test_platt_map_never_reverses_the_ranking():
    # Margins that point the wrong way (higher for negatives): an unconstrained Platt fit
    # would take a negative slope and reverse every ranking built on the model.
    from prescreen.model import _fit_platt

    rng = np.random.default_rng(0)
    y = rng.integers(0, 2, 400)
    margin = -2.0 * y + rng.normal(0.0, 0.5, 400)
    cal = _fit_platt(margin, y, np.ones(400))
    slope = cal.params[0]
    assert slope >= 0.0
    p = cal.apply(np.sort(margin))
    assert np.all(np.diff(p) >= 0)


@pytest.mark.parametrize("seed", range(12))
def test_small_separable_tables_train_with_two_rows_per_leaf(seed):
    # A first batch of results is small and often nearly separable; with two rows per
    # leaf and bagging, leaves of near-certain rows (hessian ~ 0) must not abort LightGBM
    # (it did with min_sum_hessian_in_leaf = 0: "best_split_info.left_count > 0").
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(18, 6))
    y = (X[:, 0] > 0).astype(int)
    if not 4 <= y.sum() <= 14:
        pytest.skip("too unbalanced a draw for calibration folds")
    model = SpillageClassifier(n_models=3, min_child_samples=2, random_state=seed, n_jobs=1)
    p = model.fit(X, y).predict_proba(X)[:, 1]
    assert np.all((p >= 0) & (p <= 1))
