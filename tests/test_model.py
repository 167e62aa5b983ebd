"""Tests of prescreen.model: the scikit-learn contract, calibration, model files."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.utils.estimator_checks import parametrize_with_checks

from prescreen.model import SpillageClassifier


def _expected_failed_checks(estimator):
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
    [SpillageClassifier(n_models=2, n_estimators=8, calibration_cv=3, random_state=0)],
    expected_failed_checks=_expected_failed_checks,
)
def test_sklearn_contract(estimator, check):
    check(estimator)
