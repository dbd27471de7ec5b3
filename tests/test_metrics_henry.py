"""Henry constant: the Langmuir limit q_sat * b (exact, from the model equation,
Langmuir 1918) and the virial fall-back on truth-known synthetic Langmuir data."""
from __future__ import annotations

import numpy as np

from test_metrics_support import batch_of, langmuir_isotherm, selection_of, stack_fits, truth_fits
from sorbrank.worker.isotherm import Isotherm
from sorbrank.worker.metrics import summarize
from sorbrank.worker.metrics.henry import VIRIAL_MAX_LOADING_FRACTION, virial_henry_constant


def test_langmuir_henry_constant_is_q_sat_times_affinity_exactly():
    params = [[5.0, 2e-5], [1.3, 7e-3]]
    isos = [langmuir_isotherm(f"i{k}", "m", "CO2", 298.0, *params[k], np.geomspace(1, 1e6, 10))
            for k in range(2)]
    batch, packed = batch_of(isos)
    out = summarize(packed, {"langmuir": truth_fits("langmuir", params)},
                    selection_of(["langmuir"] * 2), batch)
    assert out["henry_mol_per_kg_pa"][0] == 5.0 * 2e-5
    assert out["henry_mol_per_kg_pa"][1] == 1.3 * 7e-3
    assert list(out["henry_source"]) == ["model", "model"]
    assert not any("henry_from_virial" in f for f in out["flags"])


def test_virial_fall_back_recovers_a_known_henry_constant_and_flags_it():
    # Langmuir data q_sat = 4 mol/kg, b = 1e-4 1/Pa -> K_H = 4e-4 mol/kg/Pa; the virial
    # line ln(p/q) = -ln K_H + q/q_sat + ... drops a quadratic term whose bias is about
    # VIRIAL_MAX_LOADING_FRACTION^2 / 12 (about 0.5 %); tolerance 1 % (stated here).
    q_sat, b = 4.0, 1e-4
    p = np.geomspace(10.0, 1e5, 30)
    iso = langmuir_isotherm("v", "m", "CO2", 298.0, q_sat, b, p)
    # Freundlich with n > 1 has an infinite slope at p -> 0: the model cannot give K_H
    iso_inf = langmuir_isotherm("w", "m", "CO2", 298.0, q_sat, b, p)
    iso_none = langmuir_isotherm("x", "m", "CO2", 298.0, q_sat, b, p)
    batch, packed = batch_of([iso, iso_inf, iso_none])
    fits, selection = stack_fits([("henry", [0.0]), ("freundlich", [0.02, 2.5]), (None, None)])
    out = summarize(packed, fits, selection, batch)
    assert VIRIAL_MAX_LOADING_FRACTION == 0.25
    np.testing.assert_allclose(out["henry_mol_per_kg_pa"], q_sat * b, rtol=0.01)
    for k in range(3):
        assert out["henry_source"][k] == "virial"
        assert "henry_from_virial" in out["flags"][k]


def test_virial_fit_is_nan_with_too_few_points_and_flags_undetermined():
    p = np.array([100.0, 200.0])
    iso = Isotherm("few", "m", "CO2", 298.0, p, np.array([0.1, 0.2]))
    batch, packed = batch_of([iso])
    k_h, used = virial_henry_constant(packed)
    assert np.isnan(k_h[0]) and used[0] == 2
    out = summarize(packed, {}, selection_of([None], ["langmuir"]), batch)
    assert np.isnan(out["henry_mol_per_kg_pa"][0])
    assert "henry_undetermined" in out["flags"][0]
