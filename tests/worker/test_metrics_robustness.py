"""Every catalogue model, odd parameters and odd requests: the metrics return
nan + flags, never raise (invented inputs; no reference value is involved)."""
from __future__ import annotations

import numpy as np
import pytest

from model_cases import CASES
from metrics_support import batch_of, stack_fits
from sorbrank.worker.isotherm import Conditions, Isotherm, MixtureRequest
from sorbrank.worker.metrics import sorbent_metrics, summarize
from sorbrank.worker.models import CATALOGUE

P0_PA = 1e6
# the engine's truth parameters of every row of the model case table
PARAMS = {case.model_id: list(case.engine[0]) for case in CASES}


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

    assert set(PARAMS) == set(CATALOGUE)
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


def test_a_model_that_raises_is_logged_once_and_its_rows_flagged_internal_error(
        monkeypatch, caplog):
    # a Langmuir whose capacity and Henry limit raise, as a bug in a new model would
    from sorbrank.worker.models.langmuir import Langmuir

    class BrokenLangmuir(Langmuir):
        @classmethod
        def saturation_capacity(cls, params):
            raise ZeroDivisionError("bug in a model")

        @classmethod
        def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
            raise ZeroDivisionError("bug in a model")

    monkeypatch.setitem(CATALOGUE, "langmuir", BrokenLangmuir)
    p = np.geomspace(1e3, 9e5, 12)
    isos = [Isotherm(f"l{i}", "s1", "CO2", t, p, np.linspace(0.1, 3.0, p.size))
            for i, t in enumerate((298.0, 318.0))]
    isos.append(Isotherm("s", "s2", "CO2", 298.0, p, np.linspace(0.1, 3.0, p.size)))
    batch, packed = batch_of(isos)
    fits, selection = stack_fits([("langmuir", PARAMS["langmuir"])] * 2
                                 + [("sips", PARAMS["sips"])])
    # the third isotherm never meets the broken model: not eligible there, so
    # neither borrowed for its capacity nor in its averages
    selection.excluded["langmuir"] = np.array(["", "", "not eligible here"], dtype=object)
    with caplog.at_level("ERROR", logger="sorbrank.worker.metrics.common"):
        out = summarize(packed, fits, selection, batch)
    flags = [list(f) for f in out["flags"]]
    assert ["internal_error" in f for f in flags] == [True, True, False]
    assert np.all(np.isnan(out["q_sat_mol_per_kg"][:2]))
    assert np.isfinite(out["q_sat_mol_per_kg"][2]) and out["q_sat_model"][2] == "sips"
    logged = [r for r in caplog.records if "internal_error" in r.getMessage()]
    assert len(logged) == 1 and "langmuir" in logged[0].getMessage()
    assert logged[0].exc_info is not None


def test_an_error_that_ends_the_job_is_not_swallowed_by_the_metrics(monkeypatch):
    from sorbrank.worker.interrupts import register_job_ending
    from sorbrank.worker.models.langmuir import Langmuir

    class Stop(Exception):
        pass

    register_job_ending(Stop)

    class Interrupted(Langmuir):
        @classmethod
        def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
            raise Stop()

    monkeypatch.setitem(CATALOGUE, "langmuir", Interrupted)
    p = np.geomspace(1e3, 9e5, 12)
    batch, packed = batch_of([Isotherm("l", "s1", "CO2", 298.0, p, np.linspace(0.1, 3, p.size))])
    fits, selection = stack_fits([("langmuir", PARAMS["langmuir"])])
    with pytest.raises(Stop):
        summarize(packed, fits, selection, batch)
