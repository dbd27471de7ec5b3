"""Henry constant with its support.

Checks against exact results: the Langmuir limit q_sat * b (from the model
equation, Langmuir 1918) and the dual-site limit q1 b1 + q2 b2 (the sum of the
sites' limits); the delta-method variance of a product in closed form; and
truth-known synthetic data (invented, seeded) fitted by the whole catalogue,
each with its stated tolerance.
"""
from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from metrics_support import batch_of, langmuir_isotherm, selection_of, stack_fits, truth_fits
from sorbrank.worker.isotherm import Batch, Isotherm
from sorbrank.worker.metrics import summarize
from sorbrank.worker.metrics.common import positive_interval_95, t_quantile_975
from sorbrank.worker.metrics.henry import (HENRY_REGION_TOLERANCE, VIRIAL_MAX_LOADING_FRACTION,
                                           virial_henry_constant, virial_henry_fit)
from sorbrank.worker.pipeline import FitOptions, process_batch


def test_langmuir_henry_constant_is_q_sat_times_affinity_with_delta_method_stderr():
    # lowest point b p = 2e-5 and 7e-3: inside the Henry region, so the model's limit stands
    params = [[5.0, 2e-5], [1.3, 7e-3]]
    cov = [[[0.04, -1e-7], [-1e-7, 4e-12]], [[0.01, 0.0], [0.0, 1e-6]]]
    isos = [langmuir_isotherm(f"i{k}", "m", "CO2", 298.0, *params[k], np.geomspace(1, 1e6, 10))
            for k in range(2)]
    batch, packed = batch_of(isos)
    out = summarize(packed, {"langmuir": truth_fits("langmuir", params, cov)},
                    selection_of(["langmuir"] * 2), batch)
    np.testing.assert_allclose(out["henry_mol_per_kg_pa"], [5.0 * 2e-5, 1.3 * 7e-3], rtol=1e-12)
    assert list(out["henry_source"]) == ["model", "model"]
    # Var(q b) = b^2 Var(q) + q^2 Var(b) + 2 q b Cov(q, b) (delta method, exact for a product
    # to first order); central differences must reproduce it to 1e-6
    expected = [np.sqrt(2e-5**2 * 0.04 + 25.0 * 4e-12 + 2 * 5.0 * 2e-5 * -1e-7),
                np.sqrt(7e-3**2 * 0.01 + 1.3**2 * 1e-6)]
    np.testing.assert_allclose(out["henry_stderr_mol_per_kg_pa"], expected, rtol=1e-6)
    low, high = positive_interval_95(out["henry_mol_per_kg_pa"], expected, [8, 8])
    np.testing.assert_allclose(out["henry_ci95_low_mol_per_kg_pa"], low, rtol=1e-6)
    np.testing.assert_allclose(out["henry_ci95_high_mol_per_kg_pa"], high, rtol=1e-6)
    assert np.all(out["henry_ci95_low_mol_per_kg_pa"] > 0)
    for f in out["flags"]:
        assert not {"henry_from_virial", "lowest_point_outside_henry_region"} & set(f)


def test_zero_or_missing_limit_falls_back_to_virial_and_diverging_limit_is_infinite():
    # Langmuir data q_sat = 4 mol/kg, b = 1e-4 1/Pa -> K_H = 4e-4 mol/kg/Pa; the virial
    # line ln(p/q) = -ln K_H + q/q_sat + ... drops a quadratic term whose bias is about
    # VIRIAL_MAX_LOADING_FRACTION^2 / 12 (about 0.5 %); tolerance 1 % (stated here).
    q_sat, b = 4.0, 1e-4
    p = np.geomspace(10.0, 1e5, 30)
    isos = [langmuir_isotherm(i, "m", "CO2", 298.0, q_sat, b, p) for i in "vwx"]
    batch, packed = batch_of(isos)
    # Henry's law with a zero slope; Freundlich with n > 1 (slope infinite at p -> 0); nothing
    fits, selection = stack_fits([("henry", [0.0]), ("freundlich", [0.02, 2.5]), (None, None)])
    out = summarize(packed, fits, selection, batch)
    assert VIRIAL_MAX_LOADING_FRACTION == 0.25
    np.testing.assert_allclose(out["henry_virial_mol_per_kg_pa"], q_sat * b, rtol=0.01)
    for k in (0, 2):
        np.testing.assert_allclose(out["henry_mol_per_kg_pa"][k], q_sat * b, rtol=0.01)
        assert out["henry_source"][k] == "virial"
        assert "henry_from_virial" in out["flags"][k]
        # exact data: the interval is narrow but positive and holds the estimate
        low, high = out["henry_ci95_low_mol_per_kg_pa"][k], out["henry_ci95_high_mol_per_kg_pa"][k]
        assert 0 < low < out["henry_mol_per_kg_pa"][k] < high
    assert out["henry_mol_per_kg_pa"][1] == np.inf
    assert out["henry_source"][1] == "model"
    assert "henry_diverges" in out["flags"][1] and "henry_from_virial" not in out["flags"][1]
    assert np.isnan(out["henry_stderr_mol_per_kg_pa"][1])
    assert np.isnan(out["henry_ci95_low_mol_per_kg_pa"][1])


def test_virial_fit_is_nan_with_too_few_points_and_flags_undetermined():
    p = np.array([100.0, 200.0])
    iso = Isotherm("few", "m", "CO2", 298.0, p, np.array([0.1, 0.2]))
    batch, packed = batch_of([iso])
    k_h, used = virial_henry_constant(packed)
    assert np.isnan(k_h[0]) and used[0] == 2
    out = summarize(packed, {}, selection_of([None], ["langmuir"]), batch)
    assert np.isnan(out["henry_mol_per_kg_pa"][0])
    assert "henry_undetermined" in out["flags"][0]


def test_virial_standard_error_is_the_intercept_standard_error_of_the_line():
    # exact straight line ln(p/q) = c0 + c1 q plus known residuals: the intercept's standard
    # error in closed form, s * sqrt(1/n + mean(q)^2 / Sxx)
    q = np.array([0.01, 0.02, 0.04, 0.07, 0.1])
    resid = np.array([0.01, -0.02, 0.015, -0.01, 0.005])
    c0, c1 = np.log(1e3), 0.4
    p = q * np.exp(c0 + c1 * q + resid)
    # a sixth point at 2 mol/kg puts all five above inside the virial window (25 % of it)
    batch, packed = batch_of([Isotherm("line", "m", "CO2", 298.0, np.append(p, 1.0),
                                       np.append(q, 2.0))])
    k_h, se, used, _ = virial_henry_fit(packed)
    design = np.column_stack([np.ones_like(q), q])
    coef, ss, *_ = np.linalg.lstsq(design, np.log(p / q), rcond=None)
    s2 = ss[0] / (q.size - 2)
    se_c0 = np.sqrt(s2 * (1 / q.size + q.mean() ** 2 / np.sum((q - q.mean()) ** 2)))
    assert used[0] == 5
    np.testing.assert_allclose(k_h[0], np.exp(-coef[0]), rtol=1e-12)
    np.testing.assert_allclose(se[0], np.exp(-coef[0]) * se_c0, rtol=1e-9)


def test_henry_region_rule_for_langmuir_shaped_and_exponent_shaped_limits():
    q_sat, b = 3.0, 1e-4
    # lowest point b p = 0.5: the Langmuir curve's slope there is K_H / 1.5
    far = np.geomspace(5e3, 1e6, 10)
    # Toth t = 0.5 with the lowest point at b p = 0.01: its own limit is (1 + 0.1)^2 = 1.21x
    # the chord slope it has at the lowest point, a rise set by the exponent alone
    near = np.geomspace(100.0, 1e6, 10)
    toth_q = q_sat * b * near / (1 + (b * near) ** 0.5) ** 2
    # Toth t = 0.9 with the lowest point at b p = 1e-4: bend (1 + 1e-4^0.9)^(1/0.9) - 1 < 0.04 %
    close = np.geomspace(1.0, 1e6, 10)
    toth_close = q_sat * b * close / (1 + (b * close) ** 0.9) ** (1 / 0.9)
    isos = [langmuir_isotherm("lang_far", "m", "CO2", 298.0, q_sat, b, far),
            Isotherm("toth", "m", "CO2", 298.0, near, toth_q),
            Isotherm("toth_close", "m", "CO2", 298.0, close, toth_close),
            langmuir_isotherm("lang_near", "m", "CO2", 298.0, q_sat, b, near)]
    batch, packed = batch_of(isos)
    fits, selection = stack_fits([("langmuir", [q_sat, b]), ("toth", [q_sat, b, 0.5]),
                                  ("toth", [q_sat, b, 0.9]), ("langmuir", [q_sat, b])])
    out = summarize(packed, fits, selection, batch)
    bend = out["henry_bend_at_lowest_point"]
    # the Langmuir limit stands although far from the data, and says so
    assert out["henry_source"][0] == "model"
    np.testing.assert_allclose(out["henry_mol_per_kg_pa"][0], q_sat * b, rtol=1e-12)
    np.testing.assert_allclose(bend[0], 1.0 + b * far[0], rtol=1e-9)
    assert "lowest_point_outside_henry_region" in out["flags"][0]
    # Toth's exponent-made rise is refused: the virial estimate is reported
    assert out["henry_model_mol_per_kg_pa"][1] == q_sat * b
    assert (1 + (b * near[0]) ** 0.5) ** 2 > HENRY_REGION_TOLERANCE
    assert out["henry_source"][1] == "virial" and "henry_from_virial" in out["flags"][1]
    # (Toth's slope rises as sqrt(p) at low pressure: no straight virial line recovers its
    # limit either; the figure reported is the data's own, labelled as such)
    assert out["henry_mol_per_kg_pa"][1] == out["henry_virial_mol_per_kg_pa"][1]
    # ... but kept where the data reach its Henry region
    assert out["henry_source"][2] == "model"
    np.testing.assert_allclose(out["henry_mol_per_kg_pa"][2], q_sat * b, rtol=1e-12)
    # Langmuir at b p1 = 0.01: inside, bend 1.01
    np.testing.assert_allclose(bend[3], 1.01, rtol=1e-9)
    for k in (2, 3):
        assert "lowest_point_outside_henry_region" not in out["flags"][k]


def _dual_site_truth_set(n: int, seed: int):
    """Dual-site Langmuir isotherms, 8 points from b1 p = 0.1 to 1e6 Pa, 1 % relative noise."""
    rng = np.random.default_rng(seed)
    isotherms, truth = [], []
    for k in range(n):
        q1, b1 = rng.uniform(0.5, 3.0), 10 ** rng.uniform(-4.0, -3.0)
        q2, b2 = rng.uniform(1.0, 5.0), b1 * 10 ** rng.uniform(-2.0, -1.0)
        p = np.geomspace(0.1 / b1, 1e6, 8)
        q = (q1 * b1 * p / (1 + b1 * p) + q2 * b2 * p / (1 + b2 * p)) * (
            1 + 0.01 * rng.standard_normal(p.size))
        isotherms.append(Isotherm(f"ds{k}", "Tideglass-31-DS", "CO2", 298.0, p, q))
        truth.append(q1 * b1 + q2 * b2)
    return Batch("dual-site truth", isotherms), np.array(truth)


def test_dual_site_truth_set_fitted_by_the_catalogue():
    # Before this rule, on this set (seed 16, 200 isotherms): Toth's limit reached 10.6x the
    # truth (median 1.47x), Redlich-Peterson 1.64x. Measured after: every finite figure within
    # 9.1 %. Tolerance stated: 12 % for every finite figure, median within 3 %.
    batch, truth = _dual_site_truth_set(200, seed=16)
    result = process_batch(batch, FitOptions())
    s = result.summary
    henry = s["henry_mol_per_kg_pa"]
    finite = np.isfinite(henry)
    ratio = henry[finite] / truth[finite]
    assert finite.sum() >= 100
    assert np.all(np.abs(ratio - 1) < 0.12), (ratio.min(), ratio.max())
    assert abs(np.median(ratio) - 1) < 0.03
    exponent_selected = np.isin(result.selection.best, ["toth", "redlich_peterson"])
    assert exponent_selected.sum() >= 20  # the set exercises the rule
    # Sips fits with s < 1 diverge at p -> 0: inf, flagged, the data's virial figure beside it
    diverging = ~finite
    assert diverging.sum() >= 10
    for i in np.flatnonzero(diverging):
        assert result.selection.best[i] == "sips" and henry[i] == np.inf
        assert "henry_diverges" in s["flags"][i]
        assert abs(s["henry_virial_mol_per_kg_pa"][i] / truth[i] - 1) < 0.15
    # every finite figure has a positive interval
    assert np.all(s["henry_ci95_low_mol_per_kg_pa"][finite] > 0)
    assert np.all(s["henry_ci95_high_mol_per_kg_pa"][finite] > henry[finite])


def test_infinite_henry_constant_survives_parquet_and_json_with_its_flag(tmp_path):
    p = np.geomspace(1.0, 1e5, 10)
    # Sips data with s = 0.6: no model but Sips fits it, and its slope at p -> 0 diverges
    q = 3.0 * (1e-3 * p) ** 0.6 / (1 + (1e-3 * p) ** 0.6)
    batch = Batch("sips", [Isotherm("s06", "Tideglass-31-S", "CO2", 298.0, p, q)])
    result = process_batch(batch, FitOptions(models="sips,langmuir"))
    assert result.selection.best[0] == "sips"
    assert result.summary["henry_mol_per_kg_pa"][0] == np.inf
    path = tmp_path / "summary.parquet"
    pq.write_table(result.summary_table(), path)
    table = pq.read_table(path)
    assert table["henry_mol_per_kg_pa"].type == pa.float64()
    assert table["henry_mol_per_kg_pa"][0].as_py() == float("inf")
    assert "henry_diverges" in table["quality_flags"][0].as_py()
    record = json.loads(json.dumps(result.to_json(), allow_nan=False))["isotherms"][0]
    assert record["summary"]["henry_mol_per_kg_pa"] is None
    assert record["summary"]["henry_source"] == "model"
    assert "henry_diverges" in record["quality_flags"]


def _coverage(n_points: int, n_isotherms: int, seed: int) -> tuple[float, float]:
    rng = np.random.default_rng(seed)
    q_sat, b, sigma = 2.0, 1e-4, 0.005
    p = np.geomspace(20.0, 1e5, n_points)  # lowest point b p = 0.002
    clean = q_sat * b * p / (1 + b * p)
    isotherms = [Isotherm(f"L{k}", "Tideglass-31-L", "CO2", 298.0, p,
                          clean + sigma * rng.standard_normal(p.size)) for k in range(n_isotherms)]
    s = process_batch(Batch("coverage", isotherms), FitOptions(models="langmuir")).summary
    assert set(s["henry_source"]) == {"model"}
    covered = (s["henry_ci95_low_mol_per_kg_pa"] <= q_sat * b) & \
              (q_sat * b <= s["henry_ci95_high_mol_per_kg_pa"])
    return float(np.mean(covered)), float(np.median(s["henry_mol_per_kg_pa"]) / (q_sat * b))


def test_langmuir_henry_interval_covers_the_truth_at_the_nominal_rate():
    # 600 isotherms each: the coverage's Monte Carlo standard error is 0.9 %, so a nominal
    # 95 % lands in 92-98 % with more than 99 % probability; median within 2 % of q_sat b
    for n_points in (5, 8):
        coverage, median_ratio = _coverage(n_points, 600, seed=1600 + n_points)
        assert 0.92 <= coverage <= 0.98, (n_points, coverage)
        assert abs(median_ratio - 1) < 0.02, (n_points, median_ratio)
    assert t_quantile_975(3) > 3.18  # the 5-point interval uses Student t on 3 dof
