"""Cost model: shape, fit against scikit-learn least squares, interval, overrides, JSON."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from ase.build import mx2
from ase.calculators.calculator import kptdensity2monkhorstpack
from pymatgen.io.ase import AseAtomsAdaptor
from sklearn.linear_model import LinearRegression

from prescreen.acquire.cost import (
    COST_TERMS,
    DEFAULT_EXPONENTS,
    CostModel,
    descriptors_for_structure,
    kpoints_for_cell,
    valence_electrons,
)
from prescreen.errors import InputError


def _records(n, seed=0, exps=(1.7, 1.1, 0.8, 0.4), c0=-9.0, sigma=0.2):
    """Synthetic wall times from a known power law (generated, not reference data)."""
    rng = np.random.default_rng(seed)
    table = pd.DataFrame({
        "n_electrons": rng.integers(6, 120, n).astype(float),
        "n_kpoints": rng.integers(1, 200, n).astype(float),
        "volume": rng.uniform(80, 900, n),
        "n_atoms": rng.integers(1, 20, n).astype(float),
    })
    logt = c0 + np.log(table[list(COST_TERMS)].to_numpy()) @ np.asarray(exps)
    table["core_hours"] = np.exp(logt + rng.normal(0, sigma, n))
    return table


def test_default_shape_scales_as_documented():
    base = pd.DataFrame({"n_electrons": [26.0], "n_kpoints": [20.0], "volume": [200.0], "n_atoms": [3.0]})
    model = CostModel()
    t0 = model.predict(base)[0]
    for term, exponent in DEFAULT_EXPONENTS.items():
        doubled = base.copy()
        doubled[term] *= 2
        assert model.predict(doubled)[0] / t0 == pytest.approx(2.0**exponent)
    # the SOC run costs soc_factor times the scalar run: total scales with (1 + soc_factor)
    assert model.with_coefficients(soc_factor=1.0).predict(base)[0] / t0 == pytest.approx(2 / 4)
    assert model.scaled(2.5).predict(base)[0] == pytest.approx(2.5 * t0)


def test_lcao_preset_is_cubic_in_atoms():
    base = pd.DataFrame({"n_electrons": [26.0], "n_kpoints": [20.0], "volume": [200.0], "n_atoms": [3.0]})
    model = CostModel.for_code("lcao")
    assert model.predict(base)[0] == pytest.approx(CostModel().predict(base)[0])  # same reference cell
    bigger = base.assign(n_atoms=6.0, volume=400.0, n_electrons=52.0)
    assert model.predict(bigger)[0] / model.predict(base)[0] == pytest.approx(8.0)
    with pytest.raises(InputError, match="unknown code kind"):
        CostModel.for_code("tight-binding")


def test_unpenalised_fit_equals_ordinary_least_squares():
    rec = _records(60)
    fitted = CostModel().fit(rec, ridge=0.0)
    # reference: scikit-learn LinearRegression on the log-transformed columns
    ols = LinearRegression().fit(np.log(rec[list(COST_TERMS)]), np.log(rec["core_hours"]))
    assert [fitted.exponents[t] for t in COST_TERMS] == pytest.approx(ols.coef_, abs=1e-8)
    assert np.log(fitted.predict(rec)) == pytest.approx(ols.predict(np.log(rec[list(COST_TERMS)])), abs=1e-8)
    assert fitted.n_fitted == 60


def test_fit_recovers_a_known_power_law_and_interval_covers():
    fitted = CostModel().fit(_records(400, seed=1))
    assert [fitted.exponents[t] for t in COST_TERMS] == pytest.approx([1.7, 1.1, 0.8, 0.4], abs=0.05)
    assert fitted.log_sigma == pytest.approx(0.2, rel=0.15)
    fresh = _records(2000, seed=2)
    pred, low, high = fitted.predict_interval(fresh, level=0.9)
    inside = np.mean((fresh["core_hours"] >= low) & (fresh["core_hours"] <= high))
    assert 0.86 <= inside <= 0.94
    assert np.all(low < pred) and np.all(pred < high)


def test_unpenalised_interval_equals_the_ols_prediction_interval_of_statsmodels():
    # reference: statsmodels OLS get_prediction(...).summary_frame, obs_ci_* (the
    # prediction interval of a new observation), on the log-transformed columns
    sm = pytest.importorskip("statsmodels.api")
    rec = _records(25, seed=4)
    fitted = CostModel().fit(rec, ridge=0.0)
    X = sm.add_constant(np.log(rec[list(COST_TERMS)].to_numpy()))
    ols = sm.OLS(np.log(rec["core_hours"].to_numpy()), X).fit()
    far = _records(6, seed=5)
    far[list(COST_TERMS)] *= [3.0, 5.0, 2.0, 4.0]  # outside the fitted range: wider
    frame = ols.get_prediction(sm.add_constant(np.log(far[list(COST_TERMS)].to_numpy()),
                                               has_constant="add")).summary_frame(alpha=0.1)
    pred, low, high = fitted.predict_interval(far, level=0.9)
    assert np.log(pred) == pytest.approx(frame["mean"].to_numpy(), abs=1e-8)
    assert np.log(low) == pytest.approx(frame["obs_ci_lower"].to_numpy(), abs=1e-8)
    assert np.log(high) == pytest.approx(frame["obs_ci_upper"].to_numpy(), abs=1e-8)
    assert fitted.dof == pytest.approx(ols.df_resid)


def test_interval_widens_away_from_the_fitted_cells_and_keeps_its_coverage():
    # fit on small cells, predict cells several times larger; over many repeats a 90 %
    # interval should hold about 90 % of the new wall times (a fixed band would not)
    inside_fitted, inside_fixed = [], []
    for seed in range(200):
        rng = np.random.default_rng(100 + seed)
        small = pd.DataFrame({"n_electrons": rng.uniform(10, 40, 12),
                              "n_kpoints": rng.uniform(5, 40, 12),
                              "volume": rng.uniform(100, 300, 12),
                              "n_atoms": rng.uniform(1, 5, 12)})
        rec = _records_at(small, seed=100 + seed)
        far = _records_at(rec.iloc[:1].assign(n_electrons=150.0, n_kpoints=300.0, volume=1500.0,
                                               n_atoms=16.0), seed=5000 + seed)
        fitted = CostModel().fit(rec, ridge=0.0)
        _, low, high = fitted.predict_interval(far, level=0.9)
        y = far["core_hours"].to_numpy()
        inside_fitted.append(bool(low[0] <= y[0] <= high[0]))
        q = 1.6448536269514722  # normal 95th percentile (standard value)
        mid = fitted.predict(far)[0]
        band = np.exp(q * fitted.log_sigma)
        inside_fixed.append(bool(mid / band <= y[0] <= mid * band))
    assert 0.84 <= np.mean(inside_fitted) <= 0.96
    assert np.mean(inside_fixed) < np.mean(inside_fitted) - 0.1


def _records_at(table, seed, exps=(1.7, 1.1, 0.8, 0.4), c0=-9.0, sigma=0.2):
    """New wall times for the given descriptors, from the power law of :func:`_records`."""
    rng = np.random.default_rng(seed)
    table = table.copy()
    logt = c0 + np.log(table[list(COST_TERMS)].to_numpy(float)) @ np.asarray(exps)
    table["core_hours"] = np.exp(logt + rng.normal(0, sigma, len(table)))
    return table


def test_fitted_uncertainty_survives_json_and_goes_with_user_coefficients(tmp_path):
    fitted = CostModel().fit(_records(30))
    path = tmp_path / "cost.json"
    fitted.save(path)
    again = CostModel.load(path)
    fresh = _records(5, seed=9)
    for a, b in zip(fitted.predict_interval(fresh), again.predict_interval(fresh)):
        assert a == pytest.approx(b, rel=1e-12)
    own = fitted.with_coefficients(exponents={"n_atoms": 3.0})
    assert own.coef_cov is None and own.dof == float("inf")
    data = json.loads(path.read_text())
    data["coef_cov"] = [[1.0, 2.0]]
    path.write_text(json.dumps(data))
    with pytest.raises(InputError, match="coef_cov"):
        CostModel.load(path)


def test_few_records_move_the_scale_not_the_shape():
    rec = _records(2, seed=3)
    fitted = CostModel().fit(rec, ridge=1e6)
    assert [fitted.exponents[t] for t in COST_TERMS] == pytest.approx(
        [DEFAULT_EXPONENTS[t] for t in COST_TERMS], abs=1e-3)
    assert fitted.log_sigma == CostModel().log_sigma  # too few records for a spread


def test_json_round_trip_and_user_override(tmp_path):
    model = CostModel().fit(_records(30)).with_coefficients(exponents={"n_atoms": 3.0}).scaled(1.5)
    path = tmp_path / "cost.json"
    model.save(path)
    again = CostModel.load(path)
    rec = _records(5, seed=9)
    assert again.predict(rec).tobytes() == model.predict(rec).tobytes()
    data = json.loads(path.read_text())
    data["multiplier"] = -2
    path.write_text(json.dumps(data))
    with pytest.raises(InputError, match=r"cost\.json:multiplier: cost multiplier must be > 0"):
        CostModel.load(path)
    data["multiplier"] = 1
    data["exponents"]["n_bands"] = 1
    path.write_text(json.dumps(data))
    with pytest.raises(InputError, match="exponents.n_bands: unknown cost term"):
        CostModel.load(path)
    path.write_text("{not json")
    with pytest.raises(InputError, match="not valid JSON"):
        CostModel.load(path)


@pytest.mark.parametrize(
    "column, value, match",
    [("volume", 0.0, "cost descriptor volume must be > 0"),
     ("core_hours", -1.0, "core_hours must be > 0"),
     ("n_kpoints", np.nan, "cost descriptor n_kpoints")],
)
def test_bad_records_are_reported_with_the_row(column, value, match):
    rec = _records(4)
    rec.index = ["a", "b", "c", "d"]
    rec.loc["c", column] = value
    with pytest.raises(InputError, match=f"times.csv:c: {match}"):
        CostModel().fit(rec, path="times.csv")


def test_unknown_term_override_is_refused():
    with pytest.raises(InputError, match="unknown cost term"):
        CostModel().with_coefficients(exponents={"ecut": 1.0})


@pytest.mark.parametrize("density", [2.0, 3.5, 6.0])
@pytest.mark.parametrize("formula, a", [("MoS2", 3.18), ("WSe2", 3.32)])
def test_kpoints_match_ase(formula, a, density):
    atoms = mx2(formula=formula, kind="2H", a=a, vacuum=9.0)
    atoms.pbc = (True, True, False)
    # reference: ASE kptdensity2monkhorstpack (same density convention)
    ref = np.prod(kptdensity2monkhorstpack(atoms, kptdensity=density, even=False))
    structure = AseAtomsAdaptor.get_structure(atoms)
    assert kpoints_for_cell(structure, density) == ref
    desc = descriptors_for_structure(structure, density)
    assert desc["area"] == pytest.approx(a * a * np.sqrt(3) / 2)  # hexagonal cell area
    assert desc["volume"] == pytest.approx(atoms.get_volume())  # reference: ASE
    assert desc["n_atoms"] == 3.0


# one element per rule: s/p main group, p-block over a filled d shell, transition metal,
# p-block over filled 4f and 5d, 5d metal over filled 4f (mendeleev is slow: ~0.5 s each)
@pytest.mark.parametrize("symbol", ["S", "Se", "Mo", "Bi", "W"])
def test_valence_electrons_match_mendeleev(symbol):
    from mendeleev import element

    # reference: mendeleev Element.nvalence()
    assert valence_electrons(symbol) == element(symbol).nvalence()


def test_unknown_element():
    with pytest.raises(InputError, match="unknown element"):
        valence_electrons("Xx")


def test_an_exact_fit_keeps_the_assumed_spread():
    # five coefficients, five records, no penalty: zero residuals say nothing of the spread
    fitted = CostModel().fit(_records(5, seed=11), ridge=0.0)
    assert fitted.log_sigma == CostModel().log_sigma
    assert fitted.coef_cov is None and fitted.dof == float("inf")
    pred, low, high = fitted.predict_interval(_records(3, seed=12))
    assert np.all(low < pred) and np.all(pred < high)


def test_out_of_fold_costs_never_use_a_rows_own_cost():
    from prescreen.acquire.cost import out_of_fold_costs

    rec = _records(40, seed=21)
    desc = rec[list(COST_TERMS)]
    pred, note = out_of_fold_costs(desc, rec["core_hours"].to_numpy(), seed=3)
    assert "out-of-fold" in note and pred.shape == (40,)
    changed = rec["core_hours"].to_numpy().copy()
    changed[7] *= 1000.0  # a wild wall time for row 7 only
    again, _ = out_of_fold_costs(desc, changed, seed=3)
    assert again[7] == pytest.approx(pred[7], rel=1e-12)  # its own prediction did not move
    assert not np.allclose(again, pred)  # the rows it helped predict did
    few, note = out_of_fold_costs(desc.iloc[:5], rec["core_hours"].to_numpy()[:5])
    assert "too few rows" in note
