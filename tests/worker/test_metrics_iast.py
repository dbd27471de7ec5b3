"""IAST (Myers & Prausnitz, AIChE J. 11 (1965) 121) against
* the extended Langmuir equation, to which IAST reduces exactly for Langmuir
  components of equal saturation capacity (same paper; REFERENCES.md);
* an independent direct solution written here: scipy.optimize.brentq on the
  equality of reduced spreading pressures, each a scipy.integrate.quad integral
  of q(p)/p (general-purpose reference libraries).
Isotherm parameters are invented (truth-known).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, optimize

from metrics_support import batch_of, stack_fits
from sorbrank.worker.isotherm import Isotherm, MixtureRequest
from sorbrank.worker.metrics import sorbent_metrics
from sorbrank.worker.metrics.iast import spreading_pressure
from sorbrank.worker.models import CATALOGUE

T_K = 298.0
P_PA = np.geomspace(10.0, 2e6, 25)


def langmuir(p, q_sat, b):
    return q_sat * b * p / (1 + b * p)


def toth(p, q_sat, b, t):
    return q_sat * b * p / (1 + (b * p) ** t) ** (1 / t)


def independent_binary_iast(q1, q2, y1, p_total):
    """x1 from brentq on psi1(y1 P / x1) = psi2(y2 P / (1 - x1)), psi by quad."""
    def psi(q, p0):
        value, _ = integrate.quad(lambda p: q(p) / p, 0.0, p0, limit=400,
                                  epsabs=0.0, epsrel=1e-13)
        return value

    def gap(x1):
        return psi(q1, y1 * p_total / x1) - psi(q2, (1 - y1) * p_total / (1 - x1))

    x1 = optimize.brentq(gap, 1e-12, 1 - 1e-12, xtol=1e-15, rtol=1e-14)
    p1, p2 = y1 * p_total / x1, (1 - y1) * p_total / (1 - x1)
    q_total = 1 / (x1 / q1(p1) + (1 - x1) / q2(p2))
    return x1, np.array([x1 * q_total, (1 - x1) * q_total])


def mixture_rows(components, mixtures):
    """components: list of (gas, model_id, params, loading function)."""
    isos, fit_list = [], []
    for k, (gas, model_id, params, q) in enumerate(components):
        isos.append(Isotherm(f"i{k}", "m", gas, T_K, P_PA, q(P_PA)))
        fit_list.append((model_id, params))
    batch, packed = batch_of(isos, mixtures=mixtures)
    fits, selection = stack_fits(fit_list)
    return [r for r in sorbent_metrics(packed, fits, selection, batch) if r["kind"] == "iast"]


def request(y1, p_total, sorbent="m", gases=("CO2", "N2")):
    return MixtureRequest(sorbent, list(gases), [y1, 1 - y1], p_total, T_K)


@pytest.mark.parametrize("y1,p_total", [(0.15, 1e5), (0.5, 1e4), (0.9, 1e6), (0.02, 3e5)])
def test_equal_capacity_langmuir_equals_extended_langmuir(y1, p_total):
    q_sat, b1, b2 = 4.0, 3e-5, 2e-6
    rows = mixture_rows([("CO2", "langmuir", [q_sat, b1], lambda p: langmuir(p, q_sat, b1)),
                         ("N2", "langmuir", [q_sat, b2], lambda p: langmuir(p, q_sat, b2))],
                        [request(y1, p_total)])
    row = rows[0]
    y = np.array([y1, 1 - y1])
    b = np.array([b1, b2])
    # extended Langmuir: q_i = q_sat b_i y_i P / (1 + sum_j b_j y_j P)
    q_ext = q_sat * b * y * p_total / (1 + np.sum(b * y * p_total))
    np.testing.assert_allclose(row["loadings_mol_per_kg"], q_ext, rtol=1e-8)
    np.testing.assert_allclose(row["adsorbed_mole_fractions"], q_ext / q_ext.sum(), rtol=1e-8)
    assert row["selectivity"] == pytest.approx(b1 / b2, rel=1e-8)
    beyond = max(row["pure_component_pressures_pa"]) > P_PA.max()
    assert row["flags"] == (["iast_extrapolated"] if beyond else [])


@pytest.mark.parametrize("y1,p_total", [(0.15, 1e5), (0.5, 2e4), (0.85, 1e6)])
def test_unequal_capacity_langmuir_matches_independent_solution(y1, p_total):
    c1, c2 = (6.0, 4e-5), (2.5, 1e-5)
    q1, q2 = (lambda p: langmuir(p, *c1)), (lambda p: langmuir(p, *c2))
    row = mixture_rows([("CO2", "langmuir", list(c1), q1), ("N2", "langmuir", list(c2), q2)],
                       [request(y1, p_total)])[0]
    x1, loadings = independent_binary_iast(q1, q2, y1, p_total)
    assert row["adsorbed_mole_fractions"][0] == pytest.approx(x1, rel=1e-6)
    np.testing.assert_allclose(row["loadings_mol_per_kg"], loadings, rtol=1e-6)


@pytest.mark.parametrize("y1,p_total", [(0.15, 1e5), (0.6, 5e5)])
def test_numerically_integrated_toth_matches_independent_solution(y1, p_total):
    # Toth has no elementary spreading-pressure integral: the numerical rule is used
    c1, c2 = (7.0, 1e-4, 0.6), (3.0, 5e-6, 0.9)
    q1, q2 = (lambda p: toth(p, *c1)), (lambda p: toth(p, *c2))
    row = mixture_rows([("CO2", "toth", list(c1), q1), ("N2", "toth", list(c2), q2)],
                       [request(y1, p_total)])[0]
    x1, loadings = independent_binary_iast(q1, q2, y1, p_total)
    assert row["adsorbed_mole_fractions"][0] == pytest.approx(x1, rel=1e-6)
    np.testing.assert_allclose(row["loadings_mol_per_kg"], loadings, rtol=1e-6)


def test_mixed_models_langmuir_with_dual_site_matches_independent_solution():
    c1, c2 = (1.5, 2e-3, 3.0, 2e-5), (3.0, 8e-6)
    q1 = lambda p: langmuir(p, c1[0], c1[1]) + langmuir(p, c1[2], c1[3])  # noqa: E731
    q2 = lambda p: langmuir(p, *c2)  # noqa: E731
    row = mixture_rows([("CO2", "dual_site_langmuir", list(c1), q1),
                        ("N2", "langmuir", list(c2), q2)], [request(0.3, 2e5)])[0]
    x1, loadings = independent_binary_iast(q1, q2, 0.3, 2e5)
    assert row["adsorbed_mole_fractions"][0] == pytest.approx(x1, rel=1e-6)
    np.testing.assert_allclose(row["loadings_mol_per_kg"], loadings, rtol=1e-6)


def test_numerical_spreading_pressure_equals_the_analytic_langmuir_integral():
    # q_sat ln(1 + b p) is the closed form of integral_0^p q/p for Langmuir
    params = np.array([[4.0, 3e-5], [1.0, 1e-2], [9.0, 1e-8]])
    p = np.array([1e5, 3.0, 2e6])
    t, p0 = np.full(3, T_K), np.full(3, np.nan)
    numeric = spreading_pressure(CATALOGUE["langmuir"], params, t, p0, p, analytic=False)
    np.testing.assert_allclose(numeric, params[:, 0] * np.log1p(params[:, 1] * p), rtol=1e-10)


def test_extrapolation_missing_components_and_all_sorbents():
    q_sat, b1, b2 = 4.0, 3e-5, 2e-6
    comps = [("CO2", "langmuir", [q_sat, b1], lambda p: langmuir(p, q_sat, b1)),
             ("N2", "langmuir", [q_sat, b2], lambda p: langmuir(p, q_sat, b2))]
    mixtures = [
        request(0.5, 5e7),                         # p_N2^0 far above 2 MPa measured
        request(0.5, 1e5, sorbent=None),          # every sorbent with both gases
        request(0.5, 1e5, gases=("CO2", "CH4")),   # no CH4 isotherm for sorbent m
        MixtureRequest("m", ["CO2", "N2"], [0.7, 0.7], 1e5, T_K),  # fractions do not sum to 1
    ]
    rows = mixture_rows(comps, mixtures)
    assert len(rows) == 4
    assert "iast_extrapolated" in rows[0]["flags"]
    assert rows[1]["sorbent_id"] == "m" and rows[1]["flags"] == []
    assert "iast_missing_component" in rows[2]["flags"]
    assert np.isnan(rows[2]["selectivity"])
    assert "iast_invalid_request" in rows[3]["flags"]
    assert np.isnan(rows[3]["total_loading_mol_per_kg"])


def test_three_equal_capacity_langmuir_components_equal_extended_langmuir():
    # Myers & Prausnitz (1965): the equal-capacity reduction holds for any number of components
    q_sat, b = 3.0, np.array([5e-5, 1e-5, 1e-6])
    y, p_total = np.array([0.2, 0.3, 0.5]), 4e5
    isos, fit_list = [], []
    for k, gas in enumerate(["CO2", "CH4", "N2"]):
        isos.append(Isotherm(f"i{k}", "m", gas, T_K, P_PA, langmuir(P_PA, q_sat, b[k])))
        fit_list.append(("langmuir", [q_sat, b[k]]))
    batch, packed = batch_of(isos, mixtures=[MixtureRequest("m", ["CO2", "CH4", "N2"],
                                                            list(y), p_total, T_K)])
    fits, selection = stack_fits(fit_list)
    row = [r for r in sorbent_metrics(packed, fits, selection, batch) if r["kind"] == "iast"][0]
    q_ext = q_sat * b * y * p_total / (1 + np.sum(b * y * p_total))
    np.testing.assert_allclose(row["loadings_mol_per_kg"], q_ext, rtol=1e-8)


def test_request_for_every_sorbent_uses_each_sorbent_s_first_isotherm_per_gas():
    # interleaved sorbents, a repeated CO2 isotherm, one sorbent without N2 and one
    # at another temperature: a row per sorbent holding every component near the
    # request's temperature, sorted, from the batch's first isotherm of each gas
    # (the rows are grouped per sorbent in one pass)
    layout = [  # (isotherm id, sorbent, gas, temperature, affinity)
        ("b-co2", "b", "CO2", T_K, 3e-5), ("a-n2", "a", "N2", T_K, 2e-6),
        ("a-co2-1", "a", "CO2", T_K, 3e-5), ("c-co2", "c", "CO2", T_K, 3e-5),
        ("a-co2-2", "a", "CO2", T_K, 9e-5), ("b-n2", "b", "N2", T_K, 2e-6),
        ("d-co2", "d", "CO2", 350.0, 3e-5), ("d-n2", "d", "N2", 350.0, 2e-6),
    ]
    isos = [Isotherm(i, m, gas, t, P_PA, langmuir(P_PA, 4.0, b)) for i, m, gas, t, b in layout]
    batch, packed = batch_of(isos, mixtures=[request(0.15, 1e5, sorbent=None)])
    fits, selection = stack_fits([("langmuir", [4.0, b]) for *_, b in layout])
    rows = [r for r in sorbent_metrics(packed, fits, selection, batch) if r["kind"] == "iast"]
    assert [(r["sorbent_id"], r["isotherm_ids"]) for r in rows] == [
        ("a", ["a-co2-1", "a-n2"]), ("b", ["b-co2", "b-n2"])]
    # equal capacities: IAST = extended Langmuir, selectivity b1 / b2 (Myers & Prausnitz 1965)
    assert rows[0]["selectivity"] == pytest.approx(3e-5 / 2e-6, rel=1e-8)
