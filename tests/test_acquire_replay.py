"""Retrospective replay on scikit-learn generated data, with a small stand-in classifier."""

from __future__ import annotations

import math
from functools import partial

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import make_classification
from sklearn.ensemble import RandomForestClassifier

from prescreen.acquire import strategies as st
from prescreen.acquire.replay import (
    CURVE_COLUMNS,
    oracle_reference,
    plot_discovery,
    random_reference,
    random_runs_to_fraction,
    replay,
    runs_to_fraction,
    summarise,
)
from prescreen.errors import InputError


class ForestStandIn:
    """Minimal object with the SpillageClassifier protocol (fit/predict_uncertainty/ensemble_proba)."""

    def __init__(self, seed: int) -> None:
        self.forest = RandomForestClassifier(n_estimators=12, max_depth=6, random_state=seed)

    def fit(self, X, y, *, groups=None):
        self.forest.fit(X, y)
        return self

    def ensemble_proba(self, X):
        return np.stack([t.predict_proba(np.asarray(X))[:, 1] for t in self.forest.estimators_])

    def predict_uncertainty(self, X):
        m = self.ensemble_proba(X)
        return m.mean(axis=0), m.std(axis=0)


@pytest.fixture(scope="module")
def data():
    X, y = make_classification(n_samples=300, n_features=6, n_informative=4, n_redundant=0,
                               weights=[0.9], class_sep=1.5, random_state=3)
    cost = np.exp(np.random.default_rng(3).normal(0.5, 0.5, 300))
    formulas = np.array([f"F{i % 50}" for i in range(300)])
    return X, y, cost, formulas


def _run(data, strategy, seeds=(0, 1, 2), **kw):
    X, y, cost, formulas = data
    args = dict(n_initial=20, batch_budget=15.0, until=0.8, seeds=seeds, progress=False)
    args.update(kw)
    return replay(X, y, cost, formulas, strategy, ForestStandIn, **args)


def test_replay_curves_are_consistent(data):
    X, y, cost, _ = data
    curves = _run(data, st.greedy_probability)
    assert list(curves.columns) == list(CURVE_COLUMNS)
    for _, g in curves.groupby("seed"):
        assert np.all(np.diff(g["n_runs"]) > 0) and np.all(np.diff(g["hits"]) >= 0)
        assert np.all(np.diff(g["core_hours"]) > 0)
        assert g["hits"].iloc[-1] >= math.ceil(0.8 * y.sum())
        assert (g["round"] == 0).sum() == 20 and g["n_runs"].tolist() == list(range(1, len(g) + 1))
        assert g["item"].is_unique
        assert g["hits"].tolist() == np.cumsum(y[g["item"].to_numpy()]).tolist()
        assert g["core_hours"].to_numpy() == pytest.approx(np.cumsum(cost[g["item"].to_numpy()]))
    # the model-driven strategy beats random by a wide margin on separable data
    table = summarise(curves, y)
    assert table.loc[0, "acceleration_50"] > 2.0
    assert table.loc[0, "enrichment_at_%d" % y.sum()] > 2.0


def test_same_seed_same_campaign_bit_for_bit(data):
    a = _run(data, partial(st.thompson_sampling, diversity=0.3), seeds=(5,))
    b = _run(data, partial(st.thompson_sampling, diversity=0.3), seeds=(5,))
    pd.testing.assert_frame_equal(a, b, check_exact=True)


def test_two_phase_schedule_in_replay(data):
    sched = st.two_phase(st.explore_spread, st.greedy_probability, explore_rounds=2)
    curves = _run(data, sched, seeds=(0,), n_rounds=4, until=None)
    used = curves.loc[curves["round"] > 0].groupby("round")["used"].agg(set).tolist()
    assert used == [{"explore_spread"}] * 2 + [{"greedy_probability"}] * 2
    assert curves["round"].max() == 4


def test_random_reference_expected_position_matches_simulation(data):
    _, y, cost, _ = data
    N, P = y.size, int(y.sum())
    rng = np.random.default_rng(0)
    # reference: simulation of random orders (generated), k-th positive's position
    k = math.ceil(0.5 * P)
    pos = [np.flatnonzero(y[rng.permutation(N)])[k - 1] + 1 for _ in range(4000)]
    assert random_runs_to_fraction(N, P, 0.5) == pytest.approx(np.mean(pos), rel=0.03)
    ref = random_reference(y, cost)
    assert ref["hits"].iloc[-1] == P and ref["core_hours"].iloc[-1] == pytest.approx(cost.sum())


def test_oracle_and_random_strategy_against_references(data):
    X, y, cost, _ = data
    P = int(y.sum())
    oracle = oracle_reference(y, cost)
    assert runs_to_fraction(oracle, P, 0.5) == math.ceil(0.5 * P)
    assert runs_to_fraction(oracle, P, 1.0) == P
    rand = _run(data, st.random_selection, seeds=range(6), until=0.5)
    table = summarise(rand, y)
    # random selection is ~1x random within seed noise
    assert 0.5 < table.loc[0, "acceleration_50"] < 2.0


def test_summary_baseline_columns_and_plot(data, tmp_path):
    _, y, cost, _ = data
    curves = pd.concat([_run(data, st.greedy_probability, seeds=(0, 1)),
                        _run(data, st.random_selection, seeds=(0, 1), until=0.5)])
    table = summarise(curves, y, baseline="random_selection")
    assert table.set_index("strategy").loc["random_selection", "fewer_runs_vs_baseline_50"] == 0.0
    assert math.isinf(table.set_index("strategy").loc["random_selection", "runs_to_80"])
    with pytest.raises(InputError, match="baseline strategy not in the curves"):
        summarise(curves, y, baseline="nope")
    import matplotlib.pyplot as plt

    out = tmp_path / "curves.png"
    fig = plot_discovery(curves, y, cost, path=out)
    assert out.stat().st_size > 10_000
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
    assert not list(tmp_path.glob("*.tmp"))  # written whole, then renamed
    assert "core-hours" in fig.axes[1].get_xlabel().lower()
    plt.close(fig)


@pytest.mark.parametrize("kw, match", [({"n_initial": 0}, "n_initial"), ({"batch_budget": 0.0}, "batch_budget"),
                                       ({"until": 1.5}, "until")])
def test_bad_replay_arguments(data, kw, match):
    with pytest.raises(InputError, match=match):
        _run(data, st.greedy_probability, **kw)


def test_median_curve_never_decreases(data):
    from prescreen.acquire.replay import _median_curve

    curves = _run(data, st.random_selection, seeds=(0, 1, 2), until=0.5)
    grid = np.linspace(0, curves["n_runs"].max(), 200)
    med, lo, hi = _median_curve(curves, "n_runs", grid)
    ok = ~np.isnan(med)
    assert ok.sum() > 50 and np.all(np.diff(med[ok]) >= 0)
    assert np.all(lo[ok] <= med[ok]) and np.all(med[ok] <= hi[ok])


def test_benchmark_says_when_labels_are_missing(tmp_path, capsys):
    import importlib.util
    from pathlib import Path

    spec = importlib.util.spec_from_file_location(
        "bench_replay", Path(__file__).resolve().parents[1] / "benchmarks" / "replay.py")
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    assert bench.main([str(tmp_path / "plot.png"), "--data", str(tmp_path)]) == 2
    assert "NOT RUN" in capsys.readouterr().out
    assert not (tmp_path / "plot.png").exists()
