"""Isosteric heat through the whole engine, against truth sets of our own.

Truth: dual-site Langmuir with van 't Hoff affinities b_i = b0_i exp(E_i/RT)
at 273.15, 298.15 and 323.15 K (invented parameters). The exact heat at a
loading is exact Clausius-Clapeyron on the truth model: the truth isotherm
is inverted for p(n) at the same three temperatures (root finding, no fit)
and ln p regressed on 1/T, so only what the fits add is measured. A
single-site Langmuir truth has the constant heat E at every loading
(REFERENCES.md, Clausius-Clapeyron at constant loading).

Noise: 1 % of the loading plus 0.002 mol/kg, as a typical volumetric rig
quotes it (common practice, the sample campaign's figure). Fixed seeds; all
replicas of a set go through one batch (one sorbent id per replica).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import constants, optimize

from sorbrank.worker.isotherm import Batch, Isotherm
from sorbrank.worker.pipeline import FitOptions, process_batch

R = constants.R
TEMPERATURES_K = (273.15, 298.15, 323.15)
NOISE_REL, NOISE_ABS_MOL_PER_KG = 0.01, 0.002
REPLICAS = 24
# Within TOLERANCE at every reported loading for at least SHARE of the
# replicas, and no replica beyond OUTLIER. Measured over 64 replicas (seed
# 101): worst error per replica, median / 90 % / max, separated sites 0.95 /
# 2.3 / 5.1 kJ/mol (the 5 beyond 3 kJ/mol: the dual-site fit failed at one
# temperature and Freundlich became the common family), close sites 1.3 /
# 2.4 / 2.9, single site 1.1 / 2.0 / 4.5 (Redlich-Peterson at the top end).
TOLERANCE_J_PER_MOL = 3000.0
SHARE_WITHIN_TOLERANCE = 0.85
OUTLIER_J_PER_MOL = 6000.0

# (q_sat_i mol/kg, E_i J/mol, b_i at 298.15 K in 1/Pa), pressures in Pa
TRUTH_SETS = {
    # sites 200x apart in affinity, a rig from 1 kPa: the hot isotherm starts
    # at ~1 mol/kg, so the old 5 %-of-q_max grid extrapolated far below it
    "separated_sites": {"sites": ((1.2, 45_000.0, 1e-3), (5.0, 22_000.0, 5e-6)),
                        "pressure_pa": np.geomspace(1e3, 1e5, 12)},
    # sites 10x apart, sub-ambient CO2 rig: per-temperature selections mix
    # dual-site, Redlich-Peterson, Toth, Sips and Langmuir
    "close_sites": {"sites": ((1.5, 48_000.0, 1e-4), (5.0, 24_000.0, 1e-5)),
                    "pressure_pa": np.geomspace(100.0, 1e5, 20)},
}


def affinity_per_pa(b_298, energy_j_per_mol, temperature_k):
    return b_298 * np.exp(energy_j_per_mol / R * (1.0 / temperature_k - 1.0 / 298.15))


def truth_loading(sites, pressure_pa, temperature_k):
    p = np.asarray(pressure_pa, dtype=float)
    total = np.zeros_like(p)
    for q_sat, energy, b_298 in sites:
        bp = affinity_per_pa(b_298, energy, temperature_k) * p
        total = total + q_sat * bp / (1.0 + bp)
    return total


def truth_pressure(sites, loading, temperature_k):
    return np.array([np.exp(optimize.brentq(
        lambda ln_p: truth_loading(sites, np.exp(ln_p), temperature_k) - n, -80.0, 80.0,
        xtol=1e-14, rtol=1e-15)) for n in loading])


def exact_qst_j_per_mol(sites, loading, temperatures_k=TEMPERATURES_K):
    ln_p = np.array([np.log(truth_pressure(sites, loading, t)) for t in temperatures_k])
    slope = np.polyfit(1.0 / np.asarray(temperatures_k), ln_p, 1)[0]
    return -R * slope


def truth_batch(sites, pressure_pa, seed, replicas=REPLICAS, temperatures_k=TEMPERATURES_K):
    rng = np.random.default_rng(seed)
    isotherms = []
    for r in range(replicas):
        for k, t in enumerate(temperatures_k):
            q = truth_loading(sites, pressure_pa, t)
            q = q + rng.normal(0.0, NOISE_REL * q + NOISE_ABS_MOL_PER_KG)
            isotherms.append(Isotherm(f"r{r}-t{k}", f"TRUTH-{r:02d}", "CO2", t, pressure_pa, q))
    return Batch("isosteric-truth", isotherms)


def heat_rows(batch):
    result = process_batch(batch, FitOptions())
    return [r for r in result.sorbent_rows if r["kind"] == "isosteric_heat"], batch


@pytest.fixture(scope="module", params=sorted(TRUTH_SETS))
def dual_site(request):
    spec = TRUTH_SETS[request.param]
    rows, batch = heat_rows(truth_batch(spec["sites"], spec["pressure_pa"], seed=16))
    return spec, rows, batch


def test_dual_site_heat_within_tolerance_at_every_reported_loading(dual_site):
    spec, rows, _ = dual_site
    assert len(rows) == REPLICAS
    worst = []
    for row in rows:
        n = np.array(row["qst_loading_mol_per_kg"])
        got = np.array(row["qst_j_per_mol"])
        assert n.size == 11 and np.all(np.isfinite(got)), row["quality_flags"]
        worst.append(np.max(np.abs(got - exact_qst_j_per_mol(spec["sites"], n))))
    assert_within_tolerance(np.array(worst))


def assert_within_tolerance(worst_j_per_mol):
    """worst_j_per_mol: each replica's largest error over its reported loadings."""
    share = np.mean(worst_j_per_mol < TOLERANCE_J_PER_MOL)
    assert share >= SHARE_WITHIN_TOLERANCE, np.sort(worst_j_per_mol)
    assert np.all(worst_j_per_mol < OUTLIER_J_PER_MOL), np.sort(worst_j_per_mol)
    assert np.all(worst_j_per_mol > 0.0)  # noisy data: not trivially exact


def test_grid_lies_inside_every_measured_loading_range_and_reaches_its_low_end(dual_site):
    _, rows, batch = dual_site
    for row in rows:
        isos = [i for i in batch.isotherms if i.sorbent_id == row["sorbent_id"]]
        common_low = max(i.loading_mol_per_kg.min() for i in isos)
        common_high = min(i.loading_mol_per_kg.max() for i in isos)
        n = np.array(row["qst_loading_mol_per_kg"])
        assert n.min() >= common_low and n.max() <= common_high
        # the low-loading end is reported, not cut away: within 10 % of the
        # common range from its bottom
        assert n.min() - common_low < 0.1 * (common_high - common_low)


def test_one_model_family_for_all_temperatures(dual_site):
    _, rows, _ = dual_site
    for row in rows:
        assert row["qst_model"] is not None and row["quality_flags"] == []


def test_single_site_langmuir_gives_the_constant_heat():
    energy = 28_000.0
    sites = ((4.0, energy, 2e-5),)
    pressure = np.geomspace(200.0, 1e6, 16)
    rows, _ = heat_rows(truth_batch(sites, pressure, seed=3))
    assert len(rows) == REPLICAS
    worst = []
    for row in rows:
        # exact Clausius-Clapeyron on the truth is E itself
        np.testing.assert_allclose(exact_qst_j_per_mol(sites, row["qst_loading_mol_per_kg"]),
                                   energy, rtol=1e-9)
        worst.append(np.max(np.abs(np.array(row["qst_j_per_mol"]) - energy)))
    assert_within_tolerance(np.array(worst))


def test_propagated_standard_error_matches_the_scatter_over_replicas():
    # 40 replicas of a Langmuir truth at two temperatures: the spread of the
    # reported heat over replicas is what the propagated standard error
    # claims (within the sampling error of a 40-sample spread, and the
    # delta method's approximation: factor 1.5 either way)
    energy = 30_000.0
    sites = ((5.0, energy, 3e-5),)
    pressure = np.geomspace(500.0, 5e5, 10)
    rows, _ = heat_rows(truth_batch(sites, pressure, seed=5, replicas=40,
                                    temperatures_k=(288.15, 308.15)))
    heat = np.array([r["isosteric_heat_j_per_mol"] for r in rows])
    stderr = np.array([r["isosteric_heat_stderr_j_per_mol"] for r in rows])
    assert np.all(np.isfinite(stderr)) and np.all(stderr > 0)
    assert all(r["method"] == "two_point" and r["quality_flags"] == [] for r in rows)
    ratio = np.std(heat, ddof=1) / np.median(stderr)
    assert 1 / 1.5 < ratio < 1.5, ratio
