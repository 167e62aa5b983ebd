"""Stop rule: expected hits left and expected core-hours to the next hit."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import stats

from prescreen.acquire.stopping import expected_cost_to_first_hit, stop_estimate
from prescreen.errors import InputError


def test_expected_cost_matches_monte_carlo():
    rng = np.random.default_rng(0)
    p = rng.random(8) * 0.4
    cost = 1 + 3 * rng.random(8)
    order = np.argsort(-(p / cost), kind="stable")
    # reference: direct simulation of the sequential search (generated outcomes)
    draws = rng.random((200_000, 8)) < p[order]
    first = np.where(draws.any(axis=1), draws.argmax(axis=1), 7)
    paid = np.concatenate([[0.0], np.cumsum(cost[order])])[first + 1]
    assert expected_cost_to_first_hit(p, cost) == pytest.approx(paid.mean(), rel=0.01)


def test_ratio_order_minimises_expected_cost():
    rng = np.random.default_rng(1)
    p = rng.random(6)
    cost = 0.5 + rng.random(6) * 4
    # reference: exhaustive search over all 720 orders
    best = min(expected_cost_to_first_hit(p, cost, order) for order in itertools.permutations(range(6)))
    assert expected_cost_to_first_hit(p, cost) == pytest.approx(best)


def test_stop_estimate_interval_and_advice():
    p = np.full(40, 0.05)
    cost = np.full(40, 2.0)
    est = stop_estimate(p, cost, max_core_hours_per_hit=100.0)
    assert est.expected_hits_left == pytest.approx(2.0)
    # reference: scipy.stats.binom quantiles (equal p)
    assert (est.hits_left_low, est.hits_left_high) == (stats.binom.ppf(0.05, 40, 0.05),
                                                        stats.binom.ppf(0.95, 40, 0.05))
    assert est.probability_any_hit == pytest.approx(1 - 0.95**40)
    # geometric search: E = c (1 - q^n) / p with q = 1 - p
    assert est.core_hours_to_next_hit == pytest.approx(2.0 * (1 - 0.95**40) / 0.05)
    assert est.advice.startswith("continue")
    assert stop_estimate(p, cost, max_core_hours_per_hit=10.0).advice.startswith("stop: the next hit")
    assert stop_estimate(np.full(40, 0.001), cost).advice.startswith("stop: fewer than one hit")
    assert stop_estimate([], []).advice == "stop: the pool is empty"


@pytest.mark.parametrize("p, cost, match", [([0.2, 1.2], [1, 1], "hit probability out of range"),
                                             ([0.2, 0.3], [1, 0], "cost must be > 0")])
def test_bad_stop_input(p, cost, match):
    with pytest.raises(InputError, match=match):
        stop_estimate(p, cost)
