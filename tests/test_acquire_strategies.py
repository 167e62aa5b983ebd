"""Strategies: one signature, budget respected, bit-for-bit reproducible, two-phase schedule."""

from __future__ import annotations

from functools import partial

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import make_classification
from sklearn.ensemble import RandomForestClassifier

from prescreen.acquire import strategies as st
from prescreen.acquire.measures import PoolView
from prescreen.errors import InputError

ALL = [
    st.greedy_probability,
    partial(st.greedy_probability, diversity=0.4),
    partial(st.greedy_probability, clusters=5),
    st.expected_hits_per_core_hour,
    partial(st.expected_hits_per_core_hour, diversity=0.3),
    st.upper_confidence_bound,
    partial(st.upper_confidence_bound, kappa=3.0, diversity=0.5),
    st.thompson_sampling,
    st.explore_spread,
    st.explore_distance,
    st.random_selection,
]


@pytest.fixture(scope="module")
def pool():
    """A pool scored by a random forest trained on scikit-learn generated data."""
    X, y = make_classification(n_samples=260, n_features=6, n_informative=4, weights=[0.85],
                               random_state=0)
    rf = RandomForestClassifier(n_estimators=15, max_depth=5, random_state=0).fit(X[:60], y[:60])
    members = np.stack([t.predict_proba(X[60:])[:, 1] for t in rf.estimators_])
    cost = 0.5 + np.exp(np.random.default_rng(0).normal(0, 0.6, 200))
    return PoolView.build([f"m{i}" for i in range(200)], X[60:], members.mean(0), members.std(0),
                          cost, members=members, X_labelled=X[:60])


@pytest.mark.parametrize("strategy", ALL, ids=lambda s: str(getattr(s, "keywords", "")) or s.__name__)
def test_strategy_contract(pool, strategy):
    a = strategy(pool, 15.0, np.random.default_rng(42))
    b = strategy(pool, 15.0, np.random.default_rng(42))
    # same seed, same proposal, bit for bit
    assert a.ids.tolist() == b.ids.tolist()
    assert a.scores.tobytes() == b.scores.tobytes() and a.reasons == b.reasons
    assert 0 < a.total_cost <= 15.0 and a.total_cost == pytest.approx(a.cost.sum())
    assert len(set(a.ids.tolist())) == len(a)
    assert a.expected_hits == pytest.approx(a.probability.sum())
    assert a.expected_hits_low <= a.expected_hits <= a.expected_hits_high
    assert all("core-h" in r and r.startswith("p=") for r in a.reasons)
    frame = a.to_frame()
    assert list(frame["id"]) == a.ids.tolist() and frame["cost_core_hours"].sum() <= 15.0


def test_greedy_takes_the_most_probable(pool):
    prop = st.greedy_probability(pool, 1e9, np.random.default_rng(0))
    assert len(prop) == len(pool)
    assert np.all(np.diff(prop.probability) <= 0)


def test_cost_aware_strategy_finds_more_expected_hits_per_budget(pool):
    rng = np.random.default_rng(0)
    greedy = st.greedy_probability(pool, 10.0, rng)
    ratio = st.expected_hits_per_core_hour(pool, 10.0, rng)
    assert ratio.expected_hits >= greedy.expected_hits


def test_excluded_ids_never_proposed(pool):
    top = st.greedy_probability(pool, 10.0, np.random.default_rng(0)).ids.tolist()
    masked = PoolView.build(pool.ids, pool.X, pool.mean, pool.std, pool.cost,
                            members=pool.members, exclude=top)
    again = st.greedy_probability(masked, 10.0, np.random.default_rng(0))
    assert not set(top) & set(again.ids.tolist())


def test_different_seeds_differ_for_random_strategies(pool):
    a = st.thompson_sampling(pool, 15.0, np.random.default_rng(1))
    b = st.thompson_sampling(pool, 15.0, np.random.default_rng(2))
    assert a.ids.tolist() != b.ids.tolist()


def test_two_phase_schedule():
    sched = st.two_phase(st.explore_spread, st.greedy_probability, explore_rounds=2)
    assert [sched.for_round(r) for r in range(4)] == [st.explore_spread] * 2 + [st.greedy_probability] * 2
    by_hours = st.two_phase(explore_rounds=0, explore_fraction=0.25, total_budget=100.0)
    assert by_hours.for_round(5, spent_core_hours=10.0) is st.explore_spread
    assert by_hours.for_round(5, spent_core_hours=30.0) is st.greedy_probability
    with pytest.raises(InputError, match="explore_fraction"):
        st.two_phase(explore_fraction=0.5)


def test_budget_too_small_gives_empty_proposal(pool):
    prop = st.greedy_probability(pool, 0.1, np.random.default_rng(0))
    assert len(prop) == 0 and prop.total_cost == 0.0 and prop.expected_hits == 0.0


def test_reason_shows_cost_interval_when_given():
    from prescreen.acquire.cost import CostModel

    desc = pd.DataFrame({"n_electrons": [26.0, 52.0], "n_kpoints": [20.0, 20.0],
                         "volume": [200.0, 400.0], "n_atoms": [3.0, 6.0]})
    cost, low, high = CostModel().predict_interval(desc)
    view = PoolView.build(["a", "b"], np.eye(2), [0.6, 0.3], [0.1, 0.1], cost,
                          cost_low=low, cost_high=high)
    prop = st.greedy_probability(view, 1e6, np.random.default_rng(0))
    assert prop.reasons[0].startswith(
        f"p=0.60 (spread 0.10), {cost[0]:.2g} core-h (interval {low[0]:.2g}-{high[0]:.2g})")


@pytest.mark.parametrize("bad", [-1.0, float("nan"), 1.5])
def test_strategies_refuse_a_diversity_outside_zero_to_one(bad):
    rng = np.random.default_rng(0)
    view = PoolView.build([f"c{i}" for i in range(6)], rng.random((6, 2)), rng.random(6),
                          np.full(6, 0.1), np.ones(6))
    with pytest.raises(InputError, match="bad diversity"):
        st.greedy_probability(view, 3.0, rng, diversity=bad)
