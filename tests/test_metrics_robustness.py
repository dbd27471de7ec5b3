"""Every catalogue model, odd parameters and odd requests: the metrics return
nan + flags, never raise (invented inputs; no reference value is involved)."""
from __future__ import annotations

import numpy as np

from test_metrics_support import batch_of, stack_fits
from sorbrank.worker.isotherm import Conditions, Isotherm, MixtureRequest
from sorbrank.worker.metrics import sorbent_metrics, summarize
from sorbrank.worker.models import CATALOGUE

P0_PA = 1e6
PARAMS = {
    "henry": [3.0e-5], "langmuir": [5.0, 2.0e-5], "dual_site_langmuir": [2.0, 1.0e-3, 4.0, 1.0e-5],
    "freundlich": [0.02, 2.5], "sips": [6.0, 1.0e-5, 0.7], "toth": [6.0, 1.0e-4, 0.6],
    "redlich_peterson": [2.0e-4, 1.0e-3, 0.8], "temkin": [1.0e-2, 2.0e3], "bet": [3.0, 100.0],
    "gab": [3.0, 50.0, 0.8], "dubinin_radushkevich": [5.0, 1.5e4],
    "dubinin_astakhov": [5.0, 1.5e4, 2.5],
}


def test_every_model_and_bad_parameters_flow_through_without_raising():
    p = np.geomspace(1e3, 9e5, 12)
    isos, fit_list = [], []
    for k, model_id in enumerate(sorted(PARAMS)):
        for t, gas in ((298.0, "CO2"), (318.0, "CO2"), (298.0, "N2")):
            isos.append(Isotherm(f"{model_id}-{t}-{gas}", model_id, gas, t, p,
                                 np.linspace(0.1, 3.0, p.size), saturation_pressure_pa=P0_PA))
            fit_list.append((model_id, PARAMS[model_id]))
    isos.append(Isotherm("nanfit", "bad", "CO2", 298.0, p, np.linspace(0.1, 3, p.size)))
    fit_list.append(("langmuir", [np.nan, np.nan]))
    isos.append(Isotherm("negative", "bad", "N2", 298.0, p, -np.linspace(0.1, 3, p.size)))
    fit_list.append(("langmuir", [-1.0, 1e-5]))
    isos.append(Isotherm("none", "bad", "CO2", 318.0, p, np.zeros(p.size)))
    fit_list.append((None, None))
    mixtures = [MixtureRequest(None, ["CO2", "N2"], [0.15, 0.85], 1e5, 298.0),
                MixtureRequest("bad", ["CO2", "N2"], [0.5, 0.5], 1e5, 298.0),
                MixtureRequest("langmuir", ["CO2", "N2"], [0.5, 0.5], -1.0, 298.0)]
    cond = Conditions(adsorption_temperature_k=298.0, desorption_temperature_k=318.0)
    batch, packed = batch_of(isos, conditions=cond, mixtures=mixtures)
    fits, selection = stack_fits(fit_list)

    out = summarize(packed, fits, selection, batch)
    rows = sorbent_metrics(packed, fits, selection, batch)

    assert set(PARAMS) <= set(CATALOGUE)
    for name, column in out.items():
        assert len(column) == packed.n, name
    assert "no_selected_model" in out["flags"][-1]
    assert np.isnan(out["q_sat_mol_per_kg"][-2])
    kinds = {r["kind"] for r in rows}
    assert {"isosteric_heat", "iast", "temperature_swing"} <= kinds
    # each sorbent's two "gases" share one fitted model here, so IAST must give x = y
    # (a gas mixed with itself) wherever the spreading pressure exists
    for r in rows:
        if r["kind"] == "iast" and r["sorbent_id"] in PARAMS and r["total_pressure_pa"] > 0:
            if r["sorbent_id"] == "temkin":   # negative loading at low p: no spreading pressure
                assert "iast_no_solution" in r["flags"]
            else:
                np.testing.assert_allclose(r["adsorbed_mole_fractions"], [0.15, 0.85], rtol=1e-9)
    for r in rows:
        for value in r.values():
            if isinstance(value, float) and not np.isfinite(value):
                assert r["flags"], r   # a missing figure always comes with a reason
