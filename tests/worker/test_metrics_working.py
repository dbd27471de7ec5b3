"""Loadings at process pressures and working capacity on truth-known Langmuir
isotherms (invented parameters; the Langmuir equation, Langmuir 1918, is the truth)."""
from __future__ import annotations

import numpy as np
import pytest

from metrics_support import batch_of, langmuir_isotherm, selection_of, stack_fits, truth_fits
from sorbrank.worker.isotherm import Conditions
from sorbrank.worker.metrics import sorbent_metrics, summarize


def langmuir(p, q_sat, b):
    return q_sat * b * p / (1 + b * p)


def test_pressure_swing_working_capacity_is_positive_and_matches_the_model():
    cond = Conditions(adsorption_pressure_pa=5e5, desorption_pressure_pa=2e4,
                      reference_pressures_pa=(1.5e4, 2.5e5))
    iso = langmuir_isotherm("i", "m", "CO2", 298.0, 6.0, 3e-5, np.geomspace(1e3, 1e6, 12))
    batch, packed = batch_of([iso], conditions=cond)
    out = summarize(packed, {"langmuir": truth_fits("langmuir", [[6.0, 3e-5]])},
                    selection_of(["langmuir"]), batch)
    q_ads, q_des = langmuir(5e5, 6.0, 3e-5), langmuir(2e4, 6.0, 3e-5)
    assert out["loading_ads_mol_per_kg"][0] == pytest.approx(q_ads, rel=1e-12)
    assert out["loading_des_mol_per_kg"][0] == pytest.approx(q_des, rel=1e-12)
    assert out["working_capacity_mol_per_kg"][0] == pytest.approx(q_ads - q_des, rel=1e-12)
    assert out["working_capacity_mol_per_kg"][0] > 0
    assert out["loading_at_15000_pa_mol_per_kg"][0] == pytest.approx(langmuir(1.5e4, 6.0, 3e-5))
    assert out["loading_at_250000_pa_mol_per_kg"][0] == pytest.approx(langmuir(2.5e5, 6.0, 3e-5))
    assert not any(f.startswith("extrapolated") for f in out["flags"][0])


def test_pressures_outside_the_measured_range_are_flagged():
    # measured 3e4..8e4 Pa: the default 1 bar adsorption lies above, 0.1 bar below
    iso = langmuir_isotherm("i", "m", "CO2", 298.0, 6.0, 3e-5, np.linspace(3e4, 8e4, 6))
    batch, packed = batch_of([iso])
    out = summarize(packed, {"langmuir": truth_fits("langmuir", [[6.0, 3e-5]])},
                    selection_of(["langmuir"]), batch)
    flags = out["flags"][0]
    assert "extrapolated_adsorption_pressure" in flags
    assert "extrapolated_desorption_pressure" in flags
    assert "extrapolated_loading_at_10000_pa" in flags
    assert np.isfinite(out["working_capacity_mol_per_kg"][0])


def test_no_selected_model_gives_nan_loadings():
    iso = langmuir_isotherm("i", "m", "CO2", 298.0, 6.0, 3e-5, np.geomspace(1e3, 1e6, 12))
    batch, packed = batch_of([iso])
    out = summarize(packed, {}, selection_of([None], ["langmuir"]), batch)
    assert np.isnan(out["loading_ads_mol_per_kg"][0])
    assert np.isnan(out["working_capacity_mol_per_kg"][0])


def test_temperature_swing_row_uses_each_temperature_s_fit():
    cond = Conditions(adsorption_pressure_pa=1e5, desorption_pressure_pa=1e5,
                      adsorption_temperature_k=298.0, desorption_temperature_k=373.0)
    p = np.geomspace(1e3, 1e6, 10)
    cold = langmuir_isotherm("cold", "m", "CO2", 298.0, 5.0, 4e-5, p)
    hot = langmuir_isotherm("hot", "m", "CO2", 373.0, 5.0, 5e-6, p)
    other = langmuir_isotherm("other", "n", "CO2", 298.0, 5.0, 4e-5, p)  # no hot isotherm
    batch, packed = batch_of([cold, hot, other], conditions=cond)
    fits, selection = stack_fits([("langmuir", [5.0, 4e-5]), ("langmuir", [5.0, 5e-6]),
                                  ("langmuir", [5.0, 4e-5])])
    rows = [r for r in sorbent_metrics(packed, fits, selection, batch)
            if r["kind"] == "temperature_swing"]
    assert len(rows) == 1 and rows[0]["sorbent_id"] == "m"
    expected = langmuir(1e5, 5.0, 4e-5) - langmuir(1e5, 5.0, 5e-6)
    assert rows[0]["working_capacity_mol_per_kg"] == pytest.approx(expected, rel=1e-12)
    assert rows[0]["working_capacity_mol_per_kg"] > 0
    assert rows[0]["flags"] == []


def test_temperature_swing_rows_take_each_sorbent_s_first_isotherm_at_each_temperature():
    # interleaved sorbents and gases, repeats at both temperatures: one row per
    # (sorbent, gas) having both, in sorted order, each from the batch's first
    # isotherm at that temperature (the rows are grouped in one pass)
    cond = Conditions(adsorption_pressure_pa=1e5, desorption_pressure_pa=1e5,
                      adsorption_temperature_k=298.0, desorption_temperature_k=373.0)
    p = np.geomspace(1e3, 1e6, 10)
    layout = [  # (isotherm id, sorbent, gas, temperature, affinity)
        ("b-cold-1", "b", "CO2", 298.0, 4e-5), ("a-hot-1", "a", "CO2", 373.0, 5e-6),
        ("a-cold-1", "a", "CO2", 298.0, 3e-5), ("b-hot-1", "b", "CO2", 373.0, 6e-6),
        ("a-cold-2", "a", "CO2", 298.0, 9e-5), ("a-hot-2", "a", "CO2", 373.0, 9e-6),
        ("a-ch4-cold", "a", "CH4", 298.0, 2e-5), ("c-cold", "c", "CO2", 298.0, 4e-5),
        ("b-cold-2", "b", "CO2", 298.0, 8e-5), ("a-ch4-hot", "a", "CH4", 373.0, 3e-6),
    ]
    isotherms = [langmuir_isotherm(i, m, gas, t, 5.0, b, p) for i, m, gas, t, b in layout]
    batch, packed = batch_of(isotherms, conditions=cond)
    fits, selection = stack_fits([("langmuir", [5.0, b]) for *_, b in layout])
    rows = [r for r in sorbent_metrics(packed, fits, selection, batch)
            if r["kind"] == "temperature_swing"]
    assert [(r["sorbent_id"], r["adsorbate"], r["isotherm_ids"]) for r in rows] == [
        ("a", "CH4", ["a-ch4-cold", "a-ch4-hot"]),
        ("a", "CO2", ["a-cold-1", "a-hot-1"]),
        ("b", "CO2", ["b-cold-1", "b-hot-1"]),
    ]
    assert rows[1]["working_capacity_mol_per_kg"] == pytest.approx(
        langmuir(1e5, 5.0, 3e-5) - langmuir(1e5, 5.0, 5e-6), rel=1e-12)


def test_a_negative_predicted_loading_is_nan_and_flagged_never_a_working_capacity():
    """Temkin (Temkin & Pyzhev 1940) q = RT/b_t ln(a_t p) is below zero for
    a_t p < 1. Truth-known: a_t = 1e-4 1/Pa, b_t = 500 J kg/mol^2 at 298 K;
    desorption at 2e3 Pa (a_t p = 0.2, q = -4.0 mol/kg), adsorption at 1e5
    Pa (a_t p = 10, q = 11.4 mol/kg). The desorption loading is nan and so is
    the working capacity, which would otherwise be 15.4 > q_ads."""
    from scipy import constants

    cond = Conditions(adsorption_pressure_pa=1e5, desorption_pressure_pa=2e3)
    p = np.geomspace(1e3, 1e6, 10)
    iso = langmuir_isotherm("t", "m", "CO2", 298.0, 5.0, 1e-4, p)  # data only set the range
    batch, packed = batch_of([iso], conditions=cond)
    out = summarize(packed, {"temkin": truth_fits("temkin", [[1e-4, 500.0]])},
                    selection_of(["temkin"]), batch)
    expected_ads = constants.R * 298.0 / 500.0 * np.log(10.0)
    assert out["loading_ads_mol_per_kg"][0] == pytest.approx(expected_ads, rel=1e-12)
    assert np.isnan(out["loading_des_mol_per_kg"][0])
    assert np.isnan(out["working_capacity_mol_per_kg"][0])
    assert "negative_predicted_loading" in out["flags"][0]


def test_working_capacity_never_exceeds_the_adsorbed_loading_across_models():
    """Every catalogue model that rises from zero, at random truth-like
    parameters, desorption pressures down to 1 Pa: wherever a working
    capacity is reported it is <= the adsorbed loading, and no reported
    loading is below zero (invented parameters; the rule is the check)."""
    rng = np.random.default_rng(1605)
    cond = Conditions(adsorption_pressure_pa=1e5, desorption_pressure_pa=1.0,
                      reference_pressures_pa=(10.0, 1e3))
    p = np.geomspace(1e3, 1e6, 8)
    cases = [("temkin", lambda: [10 ** rng.uniform(-6, -2), rng.uniform(50, 2000)]),
             ("freundlich", lambda: [10 ** rng.uniform(-3, -1), rng.uniform(1, 4)]),
             ("langmuir", lambda: [rng.uniform(1, 8), 10 ** rng.uniform(-6, -3)])]
    for model_id, draw in cases:
        params = [draw() for _ in range(30)]
        isos = [langmuir_isotherm(f"{model_id}{k}", "m", "CO2", 298.0, 5.0, 1e-5, p) for k in range(30)]
        batch, packed = batch_of(isos, conditions=cond)
        out = summarize(packed, {model_id: truth_fits(model_id, params)},
                        selection_of([model_id] * 30), batch)
        wc, q_ads = out["working_capacity_mol_per_kg"], out["loading_ads_mol_per_kg"]
        shown = np.isfinite(wc)
        assert np.all(wc[shown] <= q_ads[shown]), model_id
        for name in ("loading_ads_mol_per_kg", "loading_des_mol_per_kg",
                     "loading_at_10_pa_mol_per_kg", "loading_at_1000_pa_mol_per_kg"):
            values = out[name]
            assert not np.any(values[np.isfinite(values)] < 0), (model_id, name)
        if model_id == "temkin":  # a_t p < 1 at 1 Pa for every draw: all flagged
            assert all("negative_predicted_loading" in f for f in out["flags"])


def test_coverage_at_adsorption_is_bp_over_one_plus_bp_for_langmuir():
    """Truth-known Langmuir (Langmuir 1918): theta = q/q_sat = bp/(1 + bp) at
    the adsorption pressure of the conditions, reported with that pressure."""
    cond = Conditions(adsorption_pressure_pa=3e5, desorption_pressure_pa=1e4)
    b = np.array([1e-6, 1e-5, 3e-4])
    isos = [langmuir_isotherm(f"i{k}", "m", "CO2", 298.0, 4.0, b[k], np.geomspace(1e3, 1e6, 10))
            for k in range(3)]
    batch, packed = batch_of(isos, conditions=cond)
    out = summarize(packed, {"langmuir": truth_fits("langmuir", [[4.0, v] for v in b])},
                    selection_of(["langmuir"] * 3), batch)
    np.testing.assert_allclose(out["coverage_at_adsorption"], b * 3e5 / (1 + b * 3e5), rtol=1e-12)
    np.testing.assert_allclose(out["coverage_pressure_pa"], 3e5)


def test_coverage_uses_the_capacity_model_when_the_capacity_is_borrowed():
    """Freundlich defines no plateau, so q_sat comes from the eligible
    Langmuir fit (flag q_sat_from_other_model); theta is that fit's own
    bp/(1 + bp), not Freundlich's loading over Langmuir's capacity."""
    isos = [langmuir_isotherm("i", "m", "CO2", 298.0, 4.0, 1e-5, np.geomspace(1e3, 1e6, 10))]
    batch, packed = batch_of(isos)
    fits = {"freundlich": truth_fits("freundlich", [[0.05, 2.0]]),
            "langmuir": truth_fits("langmuir", [[4.0, 1e-5]])}
    selection = selection_of(["freundlich"], ["freundlich", "langmuir"])
    selection.excluded = {"freundlich": np.array([""], dtype=object),
                          "langmuir": np.array([""], dtype=object)}
    out = summarize(packed, fits, selection, batch)
    p_ads = batch.conditions.adsorption_pressure_pa
    assert "q_sat_from_other_model" in out["flags"][0]
    assert out["coverage_at_adsorption"][0] == pytest.approx(1e-5 * p_ads / (1 + 1e-5 * p_ads),
                                                             rel=1e-12)


def test_no_capacity_gives_no_coverage():
    isos = [langmuir_isotherm("i", "m", "CO2", 298.0, 4.0, 1e-5, np.geomspace(1e3, 1e6, 10))]
    batch, packed = batch_of(isos)
    fits, selection = stack_fits([("henry", [4e-5])])
    out = summarize(packed, fits, selection, batch)
    assert np.isnan(out["coverage_at_adsorption"][0]) and np.isnan(out["coverage_pressure_pa"][0])
