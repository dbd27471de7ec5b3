"""Goodness of fit: the runs test of residual signs and the systematic_misfit flag
(docs/results.md, "Goodness of fit"). The exact run-count distribution is checked
against brute-force enumeration of every sign order (the truth by definition) and
the normal approximation against it at a large count; the flag on truth sets of
our own."""
from __future__ import annotations

import itertools

import numpy as np
import pytest

from sorbrank.worker.isotherm import Batch, Isotherm
from sorbrank.worker.metrics.fit_quality import EXACT_RUNS_MAX, runs_test_p
from sorbrank.worker.pipeline import FitOptions, process_batch


def _runs(signs):
    return 1 + sum(a != b for a, b in zip(signs, signs[1:]))


@pytest.mark.parametrize("n_pos,n_neg", [(1, 1), (2, 3), (4, 4), (5, 7), (3, 9)])
def test_exact_runs_distribution_matches_enumeration(n_pos, n_neg):
    orders = {tuple(1 if i in pos else -1 for i in range(n_pos + n_neg))
              for pos in itertools.combinations(range(n_pos + n_neg), n_pos)}
    counts = np.array([_runs(o) for o in orders])
    for r in range(2, n_pos + n_neg + 1):
        mid_p = np.mean(counts < r) + 0.5 * np.mean(counts == r)
        assert runs_test_p(np.array([r]), np.array([n_pos]), np.array([n_neg]))[0] == \
            pytest.approx(mid_p, abs=1e-12)


def test_normal_approximation_takes_over_smoothly():
    n1 = n2 = EXACT_RUNS_MAX // 2          # last exact count
    exact = runs_test_p(np.array([25]), np.array([n1]), np.array([n2]))[0]
    approx = runs_test_p(np.array([25]), np.array([n1 + 1]), np.array([n2]))[0]
    assert exact == pytest.approx(approx, abs=0.02)


def test_no_signs_of_one_kind_no_test():
    assert np.isnan(runs_test_p(np.array([1]), np.array([5]), np.array([0]))[0])


def dual_site(pressure_pa):
    return 2 * 1e-3 * pressure_pa / (1 + 1e-3 * pressure_pa) \
        + 4 * 1e-6 * pressure_pa / (1 + 1e-6 * pressure_pa)


def test_langmuir_on_dual_site_data_is_flagged():
    """Strongly dual-site truth (2 mol/kg at b = 1e-3 1/Pa, 4 mol/kg at 1e-6 1/Pa),
    14 pressures, 0.5 % noise, Langmuir the only model: R^2 about 0.83 would pass
    silently; the residual signs run in long stretches and the flag is set."""
    rng = np.random.default_rng(8)
    p = np.geomspace(1e2, 1e6, 14)
    isos = [Isotherm(f"d{i}", "s", "CO2", 298.15, p, dual_site(p) * (1 + 0.005 * rng.standard_normal(p.size)))
            for i in range(20)]
    result = process_batch(Batch("t", isos), FitOptions(models="langmuir"))
    assert np.all(result.fits["langmuir"].r2 > 0.8)
    assert np.all(result.summary["residual_runs_p"] < 0.01)
    assert all("systematic_misfit" in f for f in result.flags())
    # the model that generated the data is not flagged
    right = process_batch(Batch("t", isos), FitOptions(models="dual_site_langmuir"))
    assert np.mean(["systematic_misfit" in f for f in right.flags()]) <= 0.15


def test_correct_model_flag_rate_is_about_the_nominal_level():
    """Monte Carlo, fixed seed: 1,000 Langmuir isotherms of 30 pressures with noise of
    1 % of q_sat, fitted by Langmuir. The share flagged is 5 % within 0.02-0.08
    (binomial SE 0.7 %; least-squares residuals alternate a little more than random
    signs, so the runs test runs slightly under its level -- 3.4 % at this seed)."""
    rng = np.random.default_rng(16)
    p = np.geomspace(1e3, 1e6, 30)
    truth = 5 * 2e-5 * p / (1 + 2e-5 * p)
    isos = [Isotherm(f"l{i}", "s", "CO2", 298.15, p, truth + 0.05 * rng.standard_normal(p.size))
            for i in range(1000)]
    result = process_batch(Batch("t", isos), FitOptions(models="langmuir"))
    rate = np.mean(["systematic_misfit" in f for f in result.flags()])
    assert 0.02 <= rate <= 0.08, rate
