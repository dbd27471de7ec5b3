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

from test_metrics_support import batch_of, stack_fits
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
