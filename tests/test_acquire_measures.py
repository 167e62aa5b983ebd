"""Measures, PoolView checks and the Poisson-binomial interval."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import stats

from prescreen.acquire.measures import (
    PoolView,
    expected_hits,
    novelty_score,
    poisson_binomial_pmf,
    thompson_score,
    ucb_score,
)
from prescreen.errors import InputError


def _view(n=6, seed=0, **kw):
    rng = np.random.default_rng(seed)
    args = dict(ids=[f"c{i}" for i in range(n)], X=rng.normal(size=(n, 3)), mean=rng.random(n),
                std=rng.random(n) * 0.1, cost=1 + rng.random(n))
    args.update(kw)
    return PoolView.build(**args)


def test_exclude_masks_pending_ids_and_ignores_unknown():
    v = _view(exclude=["c1", "c4", "not-in-pool"])
    assert list(v.ids) == ["c0", "c2", "c3", "c5"]
    assert v.X.shape == (4, 3) and v.mean.shape == (4,)


@pytest.mark.parametrize(
    "change, match",
    [
        ({"ids": ["a", "b", "a", "c", "d", "e"]}, "duplicate candidate id"),
        ({"mean": [0.1, 0.2, 1.3, 0.1, 0.1, 0.1]}, "entry c2: mean out of range"),
        ({"std": [0.1, -0.2, 0.3, 0.1, 0.1, 0.1]}, "entry c1: std out of range"),
        ({"cost": [1, 1, 1, 1, 0, 1]}, "entry c4: cost out of range"),
        ({"cost": [1, 1, np.nan, 1, 1, 1]}, "cost is not finite"),
        ({"X": np.zeros((5, 3))}, "X has the wrong shape"),
        ({"members": np.zeros((3, 5))}, "members has the wrong shape"),
    ],
)
def test_bad_pool_is_reported(change, match):
    with pytest.raises(InputError, match=match):
        _view(**change)


def test_ucb_rejects_negative_kappa():
    with pytest.raises(InputError, match="kappa"):
        ucb_score(_view(), -1.0)


def test_thompson_draws_are_member_values_and_reproducible():
    members = np.random.default_rng(3).random((4, 6))
    v = _view(members=members)
    a = thompson_score(v, np.random.default_rng(7))
    b = thompson_score(v, np.random.default_rng(7))
    assert np.array_equal(a, b)
    for j in range(6):
        assert a[j] in members[:, j]


def test_novelty_is_distance_to_nearest_labelled_point():
    X = np.array([[0.0, 0.0], [1.0, 0.0], [4.0, 0.0]])
    v = PoolView.build(["a", "b", "c"], X, [0.5] * 3, [0.0] * 3, [1.0] * 3,
                       X_labelled=np.array([[0.0, 0.0], [0.0, 1.0]]))
    d = novelty_score(v)
    assert d[0] == pytest.approx(0.0)
    assert d[0] < d[1] < d[2]
    with pytest.raises(InputError, match="labelled"):
        novelty_score(_view())


@pytest.mark.parametrize("n, p", [(10, 0.3), (25, 0.05), (40, 0.7)])
def test_poisson_binomial_equal_p_matches_scipy_binomial(n, p):
    # reference: scipy.stats.binom (the Poisson-binomial with equal p is the binomial)
    assert np.allclose(poisson_binomial_pmf([p] * n), stats.binom.pmf(np.arange(n + 1), n, p),
                       atol=1e-12)


def test_poisson_binomial_matches_enumeration():
    # reference: brute-force enumeration of all 2^n outcomes
    p = np.array([0.1, 0.9, 0.35, 0.6, 0.05, 0.5])
    pmf = np.zeros(p.size + 1)
    for outcome in itertools.product([0, 1], repeat=p.size):
        o = np.array(outcome)
        pmf[o.sum()] += np.prod(np.where(o == 1, p, 1 - p))
    assert np.allclose(poisson_binomial_pmf(p), pmf, atol=1e-14)


def test_expected_hits_interval_exact_and_normal():
    p = np.full(50, 0.2)
    mean, low, high, method = expected_hits(p, 0.9)
    assert mean == pytest.approx(10.0)
    # reference: scipy.stats.binom quantiles at 5 % and 95 %
    assert (low, high) == (stats.binom.ppf(0.05, 50, 0.2), stats.binom.ppf(0.95, 50, 0.2))
    assert method == "exact Poisson-binomial"
    big = np.full(5000, 0.01)
    mean, low, high, method = expected_hits(big, 0.9)
    assert method == "normal approximation"
    sd = np.sqrt(5000 * 0.01 * 0.99)
    assert (low, high) == pytest.approx((50 - 1.6449 * sd, 50 + 1.6449 * sd), rel=1e-4)


def test_pool_columns_indexed_by_id_are_aligned_not_taken_by_position():
    import pandas as pd

    ids = [f"c{i}" for i in range(5)]
    rng = np.random.default_rng(1)
    mean = pd.Series(rng.random(5), index=ids)
    X = pd.DataFrame(rng.random((5, 2)), index=ids)
    shuffled = mean.sample(frac=1, random_state=0)
    view = PoolView.build(ids, X.iloc[::-1], shuffled, np.full(5, 0.1), np.ones(5))
    np.testing.assert_array_equal(view.mean, mean.loc[ids].to_numpy())
    np.testing.assert_array_equal(view.X, X.loc[ids].to_numpy())
    with pytest.raises(InputError, match="does not match the candidate ids"):
        PoolView.build(ids, X, mean.rename(index={"c0": "zz"}), np.full(5, 0.1), np.ones(5))
