"""Isosteric heat by Clausius-Clapeyron on truth-known isotherms.

For a Langmuir isotherm whose affinity follows van 't Hoff, b = b0 exp(Q/RT),
the isosteric heat is exactly Q at every loading (REFERENCES.md, from the
Clausius-Clapeyron relation at constant loading); the same holds for Sips with a
temperature-independent exponent (q fixed <=> b p fixed). R from scipy.constants.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import constants

from metrics_support import batch_of, stack_fits
from sorbrank.worker.isotherm import Isotherm
from sorbrank.worker.metrics import sorbent_metrics
from sorbrank.worker.metrics.isosteric import clausius_clapeyron

Q_J_PER_MOL = 28_000.0   # invented truth
B0_PER_PA = 2e-10
Q_SAT = 5.0
P_PA = np.geomspace(10.0, 1e6, 20)


def affinity(t_k):
    return B0_PER_PA * np.exp(Q_J_PER_MOL / (constants.R * t_k))


def langmuir_rows(temperatures, sorbent="m", gas="CO2"):
    isos, fits = [], []
    for k, t in enumerate(temperatures):
        b = affinity(t)
        isos.append(Isotherm(f"{sorbent}-{k}", sorbent, gas, t, P_PA,
                             Q_SAT * b * P_PA / (1 + b * P_PA)))
        fits.append(("langmuir", [Q_SAT, b]))
    return isos, fits


def qst_rows(isos, fit_list):
    batch, packed = batch_of(isos)
    fits, selection = stack_fits(fit_list)
    return [r for r in sorbent_metrics(packed, fits, selection, batch)
            if r["kind"] == "isosteric_heat"]


@pytest.mark.parametrize("temperatures", [(273.15, 298.15, 323.15), (288.0, 308.0)])
def test_van_t_hoff_langmuir_recovers_q_across_the_loading_grid(temperatures):
    isos, fit_list = langmuir_rows(temperatures)
    rows = qst_rows(isos, fit_list)
    assert len(rows) == 1
    row = rows[0]
    np.testing.assert_allclose(row["qst_j_per_mol"], Q_J_PER_MOL, rtol=0.01)
    assert row["isosteric_heat_j_per_mol"] == pytest.approx(Q_J_PER_MOL, rel=0.01)
    assert len(row["qst_loading_mol_per_kg"]) == 11
    # the grid spans the loadings measured at every temperature, ends included
    common_low = max(iso.loading_mol_per_kg.min() for iso in isos)
    common_high = min(iso.loading_mol_per_kg.max() for iso in isos)
    assert row["qst_loading_mol_per_kg"][0] == pytest.approx(common_low, rel=1e-9)
    assert row["qst_loading_mol_per_kg"][-1] == pytest.approx(common_high, rel=1e-9)
    assert row["reference_loading_mol_per_kg"] == pytest.approx(0.5 * (common_low + common_high))
    assert row["qst_model"] == "langmuir" and row["flags"] == []
    # exact fits (zero covariance): ln p is exactly linear in 1/T, no error
    # from either the fits or the scatter
    assert row["isosteric_heat_stderr_j_per_mol"] < 1e-6 * Q_J_PER_MOL
    assert row["method"] == ("two_point" if len(temperatures) == 2 else "regression")


def test_sips_path_with_van_t_hoff_affinity_recovers_q():
    temperatures = (273.15, 298.15, 323.15)
    isos, fit_list = [], []
    for k, t in enumerate(temperatures):
        b, s = affinity(t), 0.7
        bp = (b * P_PA) ** s
        isos.append(Isotherm(f"s{k}", "m", "CO2", t, P_PA, Q_SAT * bp / (1 + bp)))
        fit_list.append(("sips", [Q_SAT, b, s]))
    row = qst_rows(isos, fit_list)[0]
    np.testing.assert_allclose(row["qst_j_per_mol"], Q_J_PER_MOL, rtol=0.01)


def test_regression_standard_error_matches_scipy_linregress():
    # source: scipy.stats.linregress (general-purpose reference) on ln p vs 1/T
    from scipy import stats
    t = np.array([273.0, 290.0, 310.0, 330.0])
    p = np.array([[1000.0], [2100.0], [4500.0], [8000.0]])
    qst, se = clausius_clapeyron(t, p)
    fit = stats.linregress(1 / t, np.log(p[:, 0]))
    assert qst[0] == pytest.approx(-constants.R * fit.slope, rel=1e-12)
    assert se[0] == pytest.approx(constants.R * fit.stderr, rel=1e-9)


def test_single_temperature_and_no_model_give_no_row_or_flags():
    isos, fit_list = langmuir_rows((298.15,), sorbent="one")
    isos2, fit_list2 = langmuir_rows((273.15, 298.15), sorbent="gap")
    fit_list2[1] = (None, None)  # the second isotherm has no selected model
    assert qst_rows(isos + isos2, fit_list + fit_list2) == []


def test_cryogenic_isotherm_is_not_combined_with_ambient_ones():
    # Clausius-Clapeyron needs a narrow temperature span; a 77 K isotherm of the
    # same sorbent and gas must not enter the ambient group (common practice).
    from sorbrank.worker.metrics.isosteric import _temperature_window
    t = np.array([298.15, 77.35, 273.15, 323.15])
    rows = _temperature_window(np.arange(4), t)
    assert sorted(t[rows]) == [273.15, 298.15, 323.15]
    # a pair far apart has no window holding both: only one isotherm remains
    assert _temperature_window(np.arange(2), np.array([77.35, 298.15])).size == 1


def test_delta_method_variance_of_ln_p_matches_the_analytic_langmuir_inverse():
    # Langmuir inverted: p = n / (b (q_sat - n)), so d ln p / d q_sat =
    # -1 / (q_sat - n) and d ln p / d b = -1 / b (analytic, from the model)
    from sorbrank.worker.metrics.isosteric import ln_pressure_variance
    from sorbrank.worker.models import CATALOGUE
    q_sat, b = 5.0, 2e-4
    cov = np.array([[0.04, 3e-7], [3e-7, 4e-10]])
    n = np.array([[0.5, 2.0, 4.0]])
    p = n / (b * (q_sat - n))
    got = ln_pressure_variance(CATALOGUE["langmuir"], np.array([[q_sat, b]]), cov[None],
                               np.array([298.15]), np.array([np.nan]), p)
    g = np.stack([-1 / (q_sat - n[0]), np.full(3, -1 / b)], axis=1)
    expected = np.einsum("ai,ij,aj->a", g, cov, g)
    np.testing.assert_allclose(got[0], expected, rtol=1e-6)


def test_weighted_regression_matches_numpy_polyfit_with_weights():
    # source: numpy.polyfit (general-purpose reference), weights 1/sigma and
    # cov="unscaled" give the slope and its propagated standard error
    t = np.array([273.15, 298.15, 323.15])
    p = np.array([[900.0], [2500.0], [6100.0]])
    var = np.array([[0.002], [0.0005], [0.004]])
    qst, se = clausius_clapeyron(t, p, var)
    coef, cov = np.polyfit(1 / t, np.log(p[:, 0]), 1, w=1 / np.sqrt(var[:, 0]), cov="unscaled")
    assert qst[0] == pytest.approx(-constants.R * coef[0], rel=1e-10)
    chi2 = np.sum((np.log(p[:, 0]) - np.polyval(coef, 1 / t)) ** 2 / var[:, 0])
    birge = max(1.0, np.sqrt(chi2 / 1))
    assert se[0] == pytest.approx(constants.R * np.sqrt(cov[0, 0]) * birge, rel=1e-9)


def test_two_temperatures_report_the_propagated_error():
    # two points, ln p variances v1, v2: var(slope) = (v1 + v2) / (1/T1 - 1/T2)^2
    t = np.array([288.0, 308.0])
    p = np.array([[1000.0], [2200.0]])
    var = np.array([[0.001], [0.003]])
    qst, se = clausius_clapeyron(t, p, var)
    dx = 1 / t[0] - 1 / t[1]
    assert qst[0] == pytest.approx(constants.R * np.log(2.2) / dx, rel=1e-12)
    assert se[0] == pytest.approx(constants.R * np.sqrt(0.004) / dx, rel=1e-12)


def heat_row_for_affinities(affinities, temperatures=(273.15, 298.15, 323.15), **kw):
    from sorbrank.worker.metrics.isosteric import isosteric_heat_rows
    from sorbrank.worker.metrics.common import has_selected_fit
    isos = [Isotherm(f"x{k}", "m", "CO2", t, P_PA, Q_SAT * b * P_PA / (1 + b * P_PA))
            for k, (t, b) in enumerate(zip(temperatures, affinities))]
    batch, packed = batch_of(isos)
    fits, selection = stack_fits([("langmuir", [Q_SAT, b]) for b in affinities])
    rows = isosteric_heat_rows(packed, fits, selection, has_selected_fit(selection, fits), **kw)
    return rows[0]


def test_negative_heat_is_withheld_and_flagged():
    # affinity rising with temperature: Qst = -15 kJ/mol, not physical
    temperatures = (273.15, 298.15, 323.15)
    b = [B0_PER_PA * 1e5 * np.exp(-15_000.0 / (constants.R * t)) for t in temperatures]
    row = heat_row_for_affinities(b, temperatures)
    assert "qst_not_positive" in row["flags"]
    assert np.all(np.isnan(row["qst_j_per_mol"])) and np.isnan(row["isosteric_heat_j_per_mol"])
    assert set(row["qst_withheld"]) == {"not_positive"}


def test_heat_beyond_the_bound_is_withheld_and_flagged():
    # 250 kJ/mol; temperatures close enough for the loading ranges to overlap
    temperatures = (298.0, 300.0, 302.0)
    b = [1e-46 * np.exp(250_000.0 / (constants.R * t)) for t in temperatures]
    row = heat_row_for_affinities(b, temperatures)
    assert "qst_above_bound" in row["flags"]
    assert set(row["qst_withheld"]) == {"above_bound"}
    # the same shape at 28 kJ/mol is reported
    ok = heat_row_for_affinities([affinity(t) for t in temperatures], temperatures)
    assert ok["flags"] == [] and set(ok["qst_withheld"]) == {""}


def test_reference_loading_outside_the_common_range_is_flagged_and_withheld():
    temperatures = (273.15, 298.15, 323.15)
    b = [affinity(t) for t in temperatures]
    inside = heat_row_for_affinities(b, temperatures, reference_loading_mol_per_kg=1.0)
    assert inside["reference_loading_mol_per_kg"] == 1.0
    assert inside["isosteric_heat_j_per_mol"] == pytest.approx(Q_J_PER_MOL, rel=1e-3)
    above = heat_row_for_affinities(b, temperatures, reference_loading_mol_per_kg=Q_SAT)
    assert "qst_reference_outside_measured_range" in above["flags"]
    assert np.isnan(above["isosteric_heat_j_per_mol"])
    # the grid is still reported
    np.testing.assert_allclose(above["qst_j_per_mol"], Q_J_PER_MOL, rtol=0.01)


def test_no_loading_measured_at_every_temperature_gives_a_flag_and_no_values():
    # the cold isotherm only measured far above the hot one's top loading
    cold = Isotherm("c", "m", "CO2", 273.15, np.array([1e5, 2e5, 4e5]), np.array([4.0, 4.4, 4.7]))
    hot = Isotherm("h", "m", "CO2", 298.15, np.array([10.0, 20.0, 40.0]),
                   np.array([0.01, 0.02, 0.04]))
    fit_list = [("langmuir", [5.0, affinity(273.15)]), ("langmuir", [5.0, affinity(298.15)])]
    row = qst_rows([cold, hot], fit_list)[0]
    assert row["flags"] == ["qst_no_common_loading_range"]
    assert row["qst_j_per_mol"] == [] and np.isnan(row["isosteric_heat_j_per_mol"])


def test_one_family_with_the_smallest_summed_criterion_is_used_at_every_temperature():
    # per-temperature choices langmuir, langmuir, sips; both fitted everywhere.
    # Summed criterion: langmuir -30 - 30 + 10 = -50 < sips -20 - 20 - 5 = -45
    from sorbrank.worker.metrics.isosteric import common_model_family
    from metrics_support import selection_of, truth_fits
    temperatures = (273.15, 298.15, 323.15)
    lang = truth_fits("langmuir", [[Q_SAT, affinity(t)] for t in temperatures])
    sips = truth_fits("sips", [[Q_SAT, affinity(t), 1.0] for t in temperatures])
    lang.aicc[:] = [-30.0, -30.0, 10.0]
    sips.aicc[:] = [-20.0, -20.0, -5.0]
    fits = {"langmuir": lang, "sips": sips}
    selection = selection_of(np.array(["langmuir", "langmuir", "sips"], dtype=object),
                             ["langmuir", "sips"])
    assert common_model_family(fits, selection, np.arange(3)) == "langmuir"
    sips.aicc[:] = [-29.0, -29.0, -5.0]   # now sips sums to -63
    assert common_model_family(fits, selection, np.arange(3)) == "sips"
    # a model excluded at one temperature cannot be the family
    selection.excluded = {"sips": np.array(["", "", "parameter at bound: exponent"], dtype=object),
                          "langmuir": np.array(["", "", ""], dtype=object)}
    assert common_model_family(fits, selection, np.arange(3)) == "langmuir"
