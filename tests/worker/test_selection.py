"""Model selection: information criteria, Akaike weights, ambiguity, exclusions.

External references named beside each check: statsmodels OLS (a general
statistics library) for the Henry model's criteria; the formulas of Hurvich &
Tsai (1989, AICc), Schwarz (1978, BIC) and Burnham & Anderson (2002, Akaike
weights); numpy.polyfit for the double-reciprocal line. The selection tests
on generated data are truth-known synthetic tests.
"""
from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.tools import eval_measures

from sorbrank.worker.engine import fit_model, fit_models
from sorbrank.worker.isotherm import Isotherm
from sorbrank.worker.models import CATALOGUE
from sorbrank.worker.packing import pack
from sorbrank.worker.results import ModelFits
from sorbrank.worker.selection import AMBIGUITY_DELTA, linearized_langmuir, select


def isotherm(iso_id, p, q):
    return Isotherm(iso_id, "m1", "CO2", 300.0, np.asarray(p, float), np.asarray(q, float))


def fake_fits(model_id, k, aicc, converged=True, applicable=True, at_bound=False, reason="converged"):
    """A ModelFits with chosen criteria (for testing the rules alone)."""
    aicc = np.asarray(aicc, float)
    n = aicc.size
    full = lambda v: np.full(n, v)  # noqa: E731
    return ModelFits(
        model_id=model_id, param_names=[f"p{j}" for j in range(k)],
        params=np.ones((n, k)), stderr=np.ones((n, k)), ci95_low=np.zeros((n, k)),
        ci95_high=np.full((n, k), 2.0), covariance=np.zeros((n, k, k)), sse=full(1.0),
        rmse=full(1.0), r2=full(0.9), aic=aicc - 1.0, aicc=aicc, bic=aicc + 1.0, n_params=k,
        converged=np.broadcast_to(converged, (n,)).copy(),
        reason=np.full(n, reason, dtype=object),
        at_bound=np.broadcast_to(np.asarray(at_bound)[..., None], (n, k)).copy(),
        applicable=np.broadcast_to(applicable, (n,)).copy(), n_points=np.full(n, 20),
    )


def test_akaike_weights_follow_burnham_and_anderson():
    # w_i = exp(-delta_i/2) / sum_j exp(-delta_j/2) (Burnham & Anderson 2002)
    values = {"a": 10.0, "b": 13.0, "c": 20.0}
    fits = {m: fake_fits(m, 2, [v]) for m, v in values.items()}
    sel = select(fits)
    delta = np.array([0.0, 3.0, 10.0])
    expected = np.exp(-delta / 2) / np.exp(-delta / 2).sum()
    np.testing.assert_allclose(sel.weights[0], expected, rtol=1e-12)
    assert sel.best[0] == "a" and not sel.ambiguous[0]
    assert sel.runner_up[0] == "b" and sel.delta_runner_up[0] == pytest.approx(3.0)


def test_within_two_units_is_ambiguous_and_the_simpler_model_wins():
    # "complex" (4 params) beats "simple" (2 params) by 1.5 < AMBIGUITY_DELTA = 2
    fits = {"complex": fake_fits("complex", 4, [100.0, 100.0]),
            "simple": fake_fits("simple", 2, [101.5, 102.5]),
            "middle": fake_fits("middle", 3, [101.0, 200.0])}
    sel = select(fits)
    assert AMBIGUITY_DELTA == 2.0
    assert sel.ambiguous[0] and sel.best[0] == "simple"
    assert sel.runner_up[0] == "complex" and sel.delta_runner_up[0] == pytest.approx(-1.5)
    # second isotherm: "simple" is 2.5 behind -> not within 2 -> the clear winner stays
    assert not sel.ambiguous[1] and sel.best[1] == "complex"


def test_failed_inapplicable_nonfinite_and_bounded_fits_are_excluded_with_reasons():
    fits = {
        "ok": fake_fits("ok", 2, [50.0]),
        "failed": fake_fits("failed", 2, [10.0], converged=False, reason="max iterations"),
        "na": fake_fits("na", 2, [10.0], converged=False, applicable=False,
                        reason="not applicable: no saturation pressure"),
        "inf": fake_fits("inf", 2, [np.inf]),
        "bound": fake_fits("bound", 2, [10.0], at_bound=True),
    }
    sel = select(fits)
    assert sel.best[0] == "ok" and not sel.ambiguous[0] and sel.runner_up[0] is None
    assert sel.excluded["ok"][0] == ""
    assert sel.excluded["failed"][0] == "not converged: max iterations"
    assert sel.excluded["na"][0] == "not applicable: no saturation pressure"
    assert sel.excluded["inf"][0] == "non-finite aicc"
    assert sel.excluded["bound"][0] == "parameter at bound: p0, p1"
    np.testing.assert_array_equal(sel.weights[0], [1.0, 0.0, 0.0, 0.0, 0.0])


def test_no_eligible_model_gives_no_best():
    sel = select({"x": fake_fits("x", 2, [np.nan], converged=False, reason="singular jacobian")})
    assert sel.best[0] is None and sel.runner_up[0] is None
    assert np.isnan(sel.delta_runner_up[0]) and sel.weights[0, 0] == 0.0


def test_criterion_is_selectable():
    # fake: aic = aicc - 1, bic = aicc + 1 for "a"; "b" has the reverse order under bic
    a, b = fake_fits("a", 2, [10.0]), fake_fits("b", 2, [15.0])
    b.bic = np.array([5.0])
    assert select({"a": a, "b": b}, "aicc").best[0] == "a"
    assert select({"a": a, "b": b}, "bic").best[0] == "b"
    with pytest.raises(ValueError):
        select({"a": a}, "hqic")


def test_henry_criteria_against_statsmodels_ols():
    """Henry's law is least squares through the origin: statsmodels OLS on
    the pressure column with no constant. Differences, stated explicitly:
    statsmodels' llf includes the Gaussian constant -n/2 (ln 2pi + 1) and its
    AIC/BIC count k = df_model + k_constant = 1 (no constant; the error
    variance is NOT counted), while sorbrank drops that constant and counts
    the error variance (K = n_params + 1 = 2). So
      aic_sorbrank = aic_sm - n(ln 2pi + 1) + 2,
      bic_sorbrank = bic_sm - n(ln 2pi + 1) + ln n,
    and AICc is checked with statsmodels' eval_measures.aicc(llf, n, 2)."""
    rng = np.random.default_rng(5)
    p = np.linspace(1e3, 1e5, 17)
    q = 2e-5 * p + 0.03 * rng.standard_normal(p.size)
    fits = fit_model(CATALOGUE["henry"], pack([isotherm("h", p, q)]))
    ols = sm.OLS(q, p[:, None]).fit()
    n = p.size
    constant = n * (np.log(2 * np.pi) + 1)
    np.testing.assert_allclose(fits.params[0, 0], ols.params[0], rtol=1e-10)
    np.testing.assert_allclose(fits.stderr[0, 0], ols.bse[0], rtol=1e-8)
    np.testing.assert_allclose(fits.sse[0], ols.ssr, rtol=1e-10)
    np.testing.assert_allclose(fits.aic[0], ols.aic - constant + 2, rtol=1e-10)
    np.testing.assert_allclose(fits.bic[0], ols.bic - constant + np.log(n), rtol=1e-10)
    np.testing.assert_allclose(fits.aicc[0], eval_measures.aicc(ols.llf, n, 2) - constant, rtol=1e-10)
    # ci95: k_h is positive, so the interval is the Wald interval of ln k_h
    # built from statsmodels' t-based half-width (docs/results.md)
    wald_low, wald_high = ols.conf_int(0.05)[0]
    spread = np.exp((wald_high - ols.params[0]) / ols.params[0])
    np.testing.assert_allclose([fits.ci95_low[0, 0], fits.ci95_high[0, 0]],
                               [ols.params[0] / spread, ols.params[0] * spread], rtol=1e-8)


def _synthetic(truth_model, params, p, rel_noise, count, seed):
    model = CATALOGUE[truth_model]
    q = model.evaluate(p[None], np.array([[300.0]]), *[np.array([[v]]) for v in params])[0]
    rng = np.random.default_rng(seed)
    sd = rel_noise * q.max()
    return [isotherm(f"{truth_model}-{i}", p, q + sd * rng.standard_normal(p.size)) for i in range(count)]


def test_well_separated_dual_site_data_select_dual_site():
    """Truth: dual-site Langmuir, sites 2 mol/kg at 1e-3 1/Pa and 4 mol/kg at
    1e-6 1/Pa (three decades apart), 40 points over 1e1..1e7 Pa, Gaussian
    noise 0.2 % of the largest loading, 20 isotherms, fixed seed. Threshold:
    every isotherm selects dual_site_langmuir (no single-site model can follow
    two steps three decades apart)."""
    isos = _synthetic("dual_site_langmuir", [2.0, 1e-3, 4.0, 1e-6], np.geomspace(1e1, 1e7, 40),
                      0.002, 20, seed=21)
    fits = fit_models(pack(isos), "all")
    sel = select(fits)
    assert list(sel.best) == ["dual_site_langmuir"] * len(isos), list(zip(sel.best, sel.runner_up))


def test_langmuir_data_select_langmuir_or_a_nested_generalisation():
    """Truth: Langmuir 5 mol/kg, 2e-5 1/Pa, 25 points over 1e2..1e6 Pa (from
    barely to nearly saturated), Gaussian noise 0.5 % of the largest loading,
    20 isotherms, fixed seed. Thresholds: every choice is Langmuir or a model
    that contains it (Sips, Toth, Redlich-Peterson, dual-site Langmuir); at
    least 80 % choose Langmuir itself (an extra parameter wins by > 2 AICc
    units only by chance, about 3 % of the time per model for nested pairs)."""
    isos = _synthetic("langmuir", [5.0, 2e-5], np.geomspace(1e2, 1e6, 25), 0.005, 20, seed=4)
    sel = select(fit_models(pack(isos), "all"))
    nested = {"langmuir", "sips", "toth", "redlich_peterson", "dual_site_langmuir"}
    assert set(sel.best) <= nested, list(sel.best)
    assert np.mean(sel.best == "langmuir") >= 0.8, list(sel.best)


def test_linearized_langmuir_is_the_double_reciprocal_line():
    """Against numpy.polyfit of 1/q on 1/p (NIST StRD Misra1d data, a Langmuir
    data set), and exact on noise-free Langmuir data (truth-known)."""
    x = np.array([77.6, 114.9, 141.1, 190.8, 239.9, 289.0, 332.8, 378.4, 434.8, 477.3,
                  536.8, 593.1, 689.1, 760.0])
    y = np.array([10.07, 14.73, 17.94, 23.93, 29.61, 35.18, 40.02, 44.82, 50.76, 55.05,
                  61.01, 66.40, 75.47, 81.78])
    p = np.geomspace(1e2, 1e6, 12)
    exact = 5.0 * 2e-5 * p / (1 + 2e-5 * p)
    q_sat, affinity = linearized_langmuir(pack([isotherm("misra", x, y), isotherm("exact", p, exact)]))
    slope, intercept = np.polyfit(1 / x, 1 / y, 1)
    np.testing.assert_allclose([q_sat[0], affinity[0]], [1 / intercept, intercept / slope], rtol=1e-9)
    np.testing.assert_allclose([q_sat[1], affinity[1]], [5.0, 2e-5], rtol=1e-9)
