"""Replicates are data: every measured point goes to the fit, and the replicates
give the pure error and the lack-of-fit test (docs/results.md, "Replicates, pure
error and lack of fit").

Source of the worked example: Bates, D. M. & Watts, D. G. (1988), Nonlinear
Regression Analysis and Its Applications, Puromycin "treated" data; the
Michaelis-Menten form v = Vm c / (K + c) is the Langmuir form with q_sat = Vm
and affinity b = 1/K. Data and published values as in /work/shared/REFERENCES.md
(typed from memory there). The lack-of-fit figures are checked against
statsmodels (OLS on a categorical pressure factor gives the pure error) and
scipy.stats (the F distribution), general-purpose reference libraries.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, stats

from sorbrank.worker.intake import read_batch
from sorbrank.worker.pipeline import FitOptions, process_batch

CONCENTRATION = [0.02, 0.02, 0.06, 0.06, 0.11, 0.11, 0.22, 0.22, 0.56, 0.56, 1.10, 1.10]
RATE = [76, 47, 97, 107, 123, 139, 159, 152, 191, 201, 207, 200]


def csv_of(pressures, loadings, sorbent="puromycin"):
    lines = ["sorbent_id,adsorbate,temperature_k,pressure_pa,loading_mol_per_kg"]
    lines += [f"{sorbent},CO2,298.15,{float(p)!r},{float(q)!r}" for p, q in zip(pressures, loadings)]
    return "\n".join(lines)


@pytest.fixture(scope="module")
def puromycin():
    batch = read_batch(csv_of(CONCENTRATION, RATE))
    return process_batch(batch, FitOptions(models="langmuir"))


def test_puromycin_estimates_and_standard_errors_match_bates_and_watts(puromycin):
    fits = puromycin.fits["langmuir"]
    assert puromycin.packed.n_points[0] == 12   # both replicates of every concentration kept
    v_max, affinity = fits.params[0]
    se_v_max, se_affinity = fits.stderr[0]
    k = 1.0 / affinity
    se_k = se_affinity / affinity**2  # the Wald covariance maps exactly by dK/db at the minimum
    # published to 4 significant digits
    assert v_max == pytest.approx(212.7, abs=0.05)
    assert se_v_max == pytest.approx(6.947, abs=0.0005)
    assert k == pytest.approx(0.06412, abs=0.000005)
    assert se_k == pytest.approx(0.008281, abs=0.0000005)
    assert np.sqrt(fits.sse[0] / 10) == pytest.approx(10.93, abs=0.005)   # on 10 degrees of freedom


def test_puromycin_pure_error_and_lack_of_fit_match_statsmodels(puromycin):
    smf = pytest.importorskip("statsmodels.formula.api")
    pd = pytest.importorskip("pandas")
    frame = pd.DataFrame({"c": CONCENTRATION, "v": RATE})
    cell_means = smf.ols("v ~ C(c)", frame).fit()    # residuals = pure error
    s = puromycin.summary
    assert s["pure_error_dof"][0] == cell_means.df_resid == 6
    assert s["pure_error_variance_mol2_per_kg2"][0] == pytest.approx(
        cell_means.ssr / cell_means.df_resid, rel=1e-12)
    sse = puromycin.fits["langmuir"].sse[0]
    f_ref = ((sse - cell_means.ssr) / (6 - 2)) / (cell_means.ssr / 6)
    assert s["lack_of_fit_dof_model"][0] == 4 and s["lack_of_fit_dof_pure_error"][0] == 6
    assert s["lack_of_fit_f"][0] == pytest.approx(f_ref, rel=1e-9)
    assert s["lack_of_fit_p"][0] == pytest.approx(stats.f.sf(f_ref, 4, 6), rel=1e-9)
    # the Michaelis-Menten form fits these data: no lack of fit at the 5 % level
    assert s["lack_of_fit_p"][0] > 0.05
    assert "lack_of_fit" not in puromycin.flags()[0]


def test_unequal_replicate_counts_give_the_least_squares_estimate_of_all_points():
    """Three replicates at low pressure, one elsewhere: the fit must be that of all
    points (scipy.optimize.curve_fit as reference), not of the per-pressure means,
    which would weigh the triplicated pressure like a single point."""
    rng = np.random.default_rng(7)
    pressure = np.array([1e3, 1e3, 1e3, 3e3, 1e4, 3e4, 1e5, 3e5, 1e6])
    truth = 4.0 * 2e-5 * pressure / (1 + 2e-5 * pressure)
    loading = truth + 0.05 * rng.standard_normal(pressure.size)
    loading[:3] += [0.15, 0.12, 0.18]     # the triplicate reads high: weight matters
    result = process_batch(read_batch(csv_of(pressure, loading)), FitOptions(models="langmuir"))
    got = result.fits["langmuir"].params[0]

    def langmuir(p, q_sat, affinity):
        return q_sat * affinity * p / (1 + affinity * p)

    reference, _ = optimize.curve_fit(langmuir, pressure, loading, p0=[4.0, 2e-5])
    np.testing.assert_allclose(got, reference, rtol=1e-6)
    distinct = np.unique(pressure)
    means = np.array([loading[pressure == p].mean() for p in distinct])
    averaged, _ = optimize.curve_fit(langmuir, distinct, means, p0=[4.0, 2e-5])
    assert np.max(np.abs(averaged / reference - 1)) > 1e-3   # averaging would have moved them
    assert result.summary["replicate_points"][0] == 2


def test_no_replicates_no_pure_error():
    pressure = np.geomspace(1e3, 1e6, 8)
    loading = 4.0 * 2e-5 * pressure / (1 + 2e-5 * pressure)
    s = process_batch(read_batch(csv_of(pressure, loading * 1.01)), FitOptions(models="langmuir")).summary
    assert s["replicate_points"][0] == 0 and s["pure_error_dof"][0] == 0
    assert np.isnan(s["pure_error_variance_mol2_per_kg2"][0]) and np.isnan(s["lack_of_fit_p"][0])


def test_lack_of_fit_flags_a_wrong_model_with_replicates():
    """Dual-site truth, replicate pairs at 8 pressures, Langmuir forced: the lack-of-fit
    F test rejects it (truth set of our own)."""
    rng = np.random.default_rng(3)
    pressure = np.repeat(np.geomspace(1e2, 1e6, 8), 2)
    truth = 2 * 1e-3 * pressure / (1 + 1e-3 * pressure) + 4 * 1e-6 * pressure / (1 + 1e-6 * pressure)
    loading = truth * (1 + 0.01 * rng.standard_normal(pressure.size))
    result = process_batch(read_batch(csv_of(pressure, loading)), FitOptions(models="langmuir"))
    assert result.summary["lack_of_fit_p"][0] < 1e-6
    assert {"lack_of_fit", "systematic_misfit"} <= set(result.flags()[0])


def test_lack_of_fit_rate_on_a_correct_model_is_the_nominal_level():
    """Monte Carlo, fixed seed: 1,000 Langmuir isotherms (10 pressures x 2 replicates,
    noise 1 % of q_sat) fitted by Langmuir; the share flagged lack_of_fit is 5 % within
    0.02-0.08 (binomial SE 0.7 %; the F test is exact only for linear models)."""
    rng = np.random.default_rng(16)
    pressure = np.repeat(np.geomspace(1e3, 1e6, 10), 2)
    truth = 5 * 2e-5 * pressure / (1 + 2e-5 * pressure)
    lines = ["sorbent_id,adsorbate,temperature_k,pressure_pa,loading_mol_per_kg"]
    for i in range(1000):
        loading = truth + 0.05 * rng.standard_normal(pressure.size)
        lines += [f"s{i},CO2,298.15,{float(p)!r},{float(q)!r}" for p, q in zip(pressure, loading)]
    result = process_batch(read_batch("\n".join(lines)), FitOptions(models="langmuir"))
    rate = np.mean(["lack_of_fit" in f for f in result.flags()])
    assert 0.02 <= rate <= 0.08, rate
