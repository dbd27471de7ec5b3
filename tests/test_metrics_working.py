"""Loadings at process pressures and working capacity on truth-known Langmuir
isotherms (invented parameters; the Langmuir equation, Langmuir 1918, is the truth)."""
from __future__ import annotations

import numpy as np
import pytest

from test_metrics_support import batch_of, langmuir_isotherm, selection_of, stack_fits, truth_fits
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
