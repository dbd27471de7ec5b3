"""The model catalogue checked against the published equations and scipy.

Every generic test here is parametrized over the one table of model cases
(tests/model_cases.py): adding a model is its class plus its row there. The
row's equation is the published one written again in scalar Python math, and
the vectorised class must agree. Jacobians are checked against central finite
differences, the seeds against scipy.optimize.least_squares (a
general-purpose reference optimiser): started from the best seed on
noise-free data it must land on the true parameters; Henry limits against
the slope at a tiny pressure, capacities against the high-pressure end, and
closed-form IAST integrals against scipy.integrate.quad.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.constants import R  # CODATA molar gas constant, J/mol/K
from scipy.integrate import quad
from scipy.optimize import least_squares

from model_cases import BY_ID, CASES
from sorbrank.worker.models import CATALOGUE, _MODELS, catalogue_description, get_model
from sorbrank.worker.models.linear import masked_linear_fit, masked_quadratic_fit

PRESSURE_PA = np.geomspace(1e2, 1e6, 30)      # realistic rig range (invented grid)
RELATIVE = np.geomspace(0.005, 0.9, 30)       # p/p0 for the relative-pressure models

IDS = [m.id for m in _MODELS]


def _grid(model):
    return RELATIVE if model.relative_pressure else PRESSURE_PA


def _columns(params):
    """(n, k) parameter rows -> k columns (n, 1), the evaluate() calling form."""
    params = np.asarray(params, dtype=float)
    return np.split(params, params.shape[1], axis=1)


def test_the_case_table_covers_the_catalogue_in_its_order():
    # a model added to the catalogue without its row would go untested
    assert IDS == [case.model_id for case in CASES]
    assert get_model("toth") is CATALOGUE["toth"]
    with pytest.raises(KeyError, match="known models"):
        get_model("no_such_model")


@pytest.mark.parametrize("model_id", IDS)
def test_parameter_names_are_the_agreed_contract(model_id):
    assert tuple(CATALOGUE[model_id].param_names()) == BY_ID[model_id].param_names


def test_relative_pressure_models_are_the_agreed_ones():
    relative = {m.id for m in _MODELS if m.relative_pressure}
    assert relative == {"bet", "gab", "dubinin_radushkevich", "dubinin_astakhov"}


def test_describe_gives_every_entry_id_equation_reference_and_units():
    for entry in catalogue_description():
        assert entry["id"] in CATALOGUE
        assert entry["title"] and entry["equation"] and entry["reference"]
        assert entry["equation"].startswith("q = ")
        assert isinstance(entry["relative_pressure"], bool)
        assert entry["parameters"], entry["id"]
        for p in entry["parameters"]:
            assert p["name"] and p["unit"] and p["meaning"]
            assert p["lower"] is None or p["upper"] is None or p["lower"] < p["upper"]
    by_id = {e["id"]: e for e in catalogue_description()}
    assert by_id["langmuir"]["has_saturation_capacity"] and by_id["langmuir"]["has_henry_limit"]
    assert not by_id["temkin"]["has_saturation_capacity"]
    assert not by_id["temkin"]["has_henry_limit"]


@pytest.mark.parametrize("model_id", IDS)
def test_evaluate_matches_the_published_equation(model_id):
    model = CATALOGUE[model_id]
    case = BY_ID[model_id]
    x = _grid(model)
    for temperature_k, params in case.truths:
        got = model.evaluate(x[None, :], np.array([[temperature_k]]),
                             *[np.array([[v]]) for v in params])
        want = [case.equation(float(xi), temperature_k, *params) for xi in x]
        np.testing.assert_allclose(got[0], want, rtol=1e-12, atol=0)


def _random_batch(model_id, rng, n):
    model = CATALOGUE[model_id]
    case = BY_ID[model_id]
    params = np.array([case.sample(rng) for _ in range(n)])
    temperature_k = rng.uniform(77.0, 350.0, size=(n, 1))
    grid = _grid(model)
    x = np.sort(rng.choice(grid, size=(n, 7)), axis=1)
    x = np.maximum(x, case.x_floor(params))
    lo, hi = model.lower_bounds(), model.upper_bounds()
    assert np.all((params > lo) & (params < hi)), "sampler must stay inside the bounds"
    return x, temperature_k, params


@pytest.mark.parametrize("model_id", IDS)
def test_jacobian_matches_central_differences(model_id):
    model = CATALOGUE[model_id]
    rng = np.random.default_rng(20240611)
    x, temperature_k, params = _random_batch(model_id, rng, 20)
    analytic = model.jacobian(x, temperature_k, *_columns(params))
    assert len(analytic) == params.shape[1]
    q = model.evaluate(x, temperature_k, *_columns(params))
    for j in range(params.shape[1]):
        step = 1e-6 * np.abs(params[:, j:j + 1])
        up, down = params.copy(), params.copy()
        up[:, j:j + 1] += step
        down[:, j:j + 1] -= step
        numeric = (model.evaluate(x, temperature_k, *_columns(up))
                   - model.evaluate(x, temperature_k, *_columns(down))) / (2 * step)
        # natural size of dq/dparam, so near-zero derivatives are judged fairly
        size = np.max(np.abs(q), axis=1, keepdims=True) / np.abs(params[:, j:j + 1])
        assert analytic[j].shape == x.shape
        error = np.abs(analytic[j] - numeric)
        allowed = 1e-6 * np.abs(numeric) + 1e-8 * size
        assert np.all(error <= allowed), (model_id, model.param_names()[j],
                                          np.max(error / allowed))


@pytest.mark.parametrize("model_id", IDS)
def test_batch_evaluation_equals_point_by_point(model_id):
    model = CATALOGUE[model_id]
    x, temperature_k, params = _random_batch(model_id, np.random.default_rng(7), 4)
    batch_q = model.evaluate(x, temperature_k, *_columns(params))
    batch_jac = model.jacobian(x, temperature_k, *_columns(params))
    assert batch_q.shape == x.shape
    for i in range(x.shape[0]):
        for k in range(x.shape[1]):
            args = (float(x[i, k]), float(temperature_k[i, 0]), *map(float, params[i]))
            assert batch_q[i, k] == pytest.approx(float(model.evaluate(*args)), rel=1e-14)
            for j, d in enumerate(model.jacobian(*args)):
                assert batch_jac[j][i, k] == pytest.approx(float(d), rel=1e-14, abs=1e-300)


def _batch_of_truths(model_id):
    model = CATALOGUE[model_id]
    truths = BY_ID[model_id].truths
    params = np.array([p for _, p in truths])
    temperature_k = np.array([[t] for t, _ in truths])
    x = np.tile(_grid(model), (len(truths), 1))
    q = model.evaluate(x, temperature_k, *_columns(params))
    return model, x, q, temperature_k, params


@pytest.mark.parametrize("model_id", IDS)
def test_best_seed_leads_scipy_least_squares_to_the_truth(model_id):
    model, x, q, temperature_k, truth = _batch_of_truths(model_id)
    seeds = model.initial_guesses(x, q, np.ones_like(x, dtype=bool), temperature_k)
    assert seeds.ndim == 3 and seeds.shape[1:] == truth.shape
    bounds = (model.lower_bounds(), model.upper_bounds())
    for i in range(truth.shape[0]):
        t_i = temperature_k[i, 0]

        def residual(p):
            return model.evaluate(x[i], t_i, *p) - q[i]

        def jac(p):
            return np.stack(np.broadcast_arrays(*model.jacobian(x[i], t_i, *p)), axis=1)

        sse = [np.sum(residual(s) ** 2) for s in seeds[:, i]]
        start = seeds[int(np.argmin(sse)), i]
        # the seed must already describe the data, not merely be somewhere the
        # optimiser happens to recover from: R^2 >= 0.95 at the seed (threshold
        # chosen here, common practice, no single source)
        assert min(sse) <= 0.05 * np.sum((q[i] - q[i].mean()) ** 2), (model_id, start)
        # scipy.optimize.least_squares, bounded trust-region reflective method
        fit = least_squares(residual, start, jac=jac, bounds=bounds, method="trf",
                            x_scale="jac", xtol=1e-15, ftol=1e-15, gtol=1e-15, max_nfev=2000)
        np.testing.assert_allclose(fit.x, truth[i], rtol=1e-6,
                                   err_msg=f"{model_id} truth {truth[i]} from seed {start}")


def _degenerate_batch(relative):
    """Rows that defeat linearised seeds: constant, two distinct points, zeros,
    negative loadings, one real point (rest padding), a single spike."""
    grid = RELATIVE[::3] if relative else PRESSURE_PA[::3]
    m = grid.size
    x = np.tile(grid, (6, 1))
    q = np.empty_like(x)
    q[0] = 2.0
    x[1, : m // 2], x[1, m // 2:] = grid[1], grid[-2]
    q[1, : m // 2], q[1, m // 2:] = 0.5, 1.5
    q[2] = 0.0
    q[3] = -np.linspace(0.1, 1.0, m)
    q[4] = 1.0
    x[4, 1:] = x[4, 0]
    q[5] = 0.0
    q[5, m // 2] = 3.0
    mask = np.ones_like(x, dtype=bool)
    mask[4, 1:] = False
    return x, q, mask


@pytest.mark.parametrize("model_id", IDS)
def test_seeds_stay_finite_and_inside_bounds_on_degenerate_data(model_id):
    model = CATALOGUE[model_id]
    x, q, mask = _degenerate_batch(model.relative_pressure)
    temperature_k = np.full((x.shape[0], 1), 298.15)
    # no stray warnings leak out of the seed rules (underflow to zero is harmless)
    with np.errstate(divide="raise", over="raise", invalid="raise", under="ignore"):
        seeds = model.initial_guesses(x, q, mask, temperature_k)
    assert seeds.shape[1:] == (x.shape[0], len(model.params))
    assert np.all(np.isfinite(seeds))
    assert np.all(seeds > model.lower_bounds()) and np.all(seeds < model.upper_bounds())


# --- Henry limits and saturation capacities ----------------------------------
def _q(model, x, t, params):
    return float(model.evaluate(np.array([[x]]), np.array([[t]]),
                                *[np.array([[v]]) for v in params])[0, 0])


def _henry(model, params, t=298.15, p0=None):
    p0_arr = None if p0 is None else np.array([p0])
    return float(model.henry_constant(np.array([params]), np.array([t]), p0_arr)[0])


def test_langmuir_henry_constant_is_exactly_capacity_times_affinity():
    # Langmuir 1918: q -> q_sat b p as p -> 0
    assert _henry(get_model("langmuir"), (3.0, 2e-5)) == 3.0 * 2e-5


HENRY_CASES = [(case.model_id, params, p0, expected)
               for case in CASES for params, p0, expected in case.henry]


@pytest.mark.parametrize("model_id", IDS)
def test_a_model_declares_a_henry_limit_exactly_when_its_row_checks_one(model_id):
    declared = catalogue_description()[IDS.index(model_id)]["has_henry_limit"]
    assert declared == bool(BY_ID[model_id].henry)


@pytest.mark.parametrize("model_id, params, p0, expected", HENRY_CASES)
def test_henry_constant_equals_the_numerical_limit_of_the_slope(model_id, params, p0, expected):
    model = get_model(model_id)
    henry = _henry(model, params, p0=p0 or 1e5)
    if expected is None:
        assert 0 < henry < np.inf
        # tiny enough that every correction term, even (b p)^0.3, is below 1e-12
        p_tiny = 1e-60
        x_tiny = p_tiny / p0 if model.relative_pressure else p_tiny
        assert _q(model, x_tiny, 298.15, params) / p_tiny == pytest.approx(henry, rel=1e-9)
        return
    assert henry == expected
    # the secant slope q/p keeps growing (inf) or shrinking (0) towards p -> 0
    p0 = p0 or 1e5
    slopes = []
    for p in (1e-6, 1e-12, 1e-24):
        x = p / p0 if model.relative_pressure else p
        slopes.append(_q(model, x, 298.15, params) / p)
    if expected == np.inf:
        assert slopes[0] < slopes[1] < slopes[2] and slopes[2] > 1e3 * slopes[0]
    else:
        assert slopes[0] > slopes[1] > slopes[2] and slopes[2] < 1e-3 * slopes[0]


def test_relative_pressure_henry_constant_is_nan_without_saturation_pressure():
    for model_id in ("bet", "gab"):
        model = get_model(model_id)
        params = np.array([(2.0, 100.0, 0.9)[: len(model.params)]])
        assert np.isnan(model.henry_constant(params, np.array([77.35]), None)[0])


def test_dubinin_astakhov_with_unit_exponent_is_a_power_law_in_x():
    # n = 1, e = R T: q = q_m x, so dq/dp = q_m / p0 exactly
    model = get_model("dubinin_astakhov")
    t = 300.0
    assert _henry(model, (4.0, R * t, 1.0), t=t, p0=2e5) == pytest.approx(4.0 / 2e5, rel=1e-12)


@pytest.mark.parametrize("model_id", IDS)
def test_saturation_capacity_is_declared_with_its_row_and_is_the_high_pressure_end(model_id):
    model, case = get_model(model_id), BY_ID[model_id]
    assert model.defines_saturation_capacity() == (case.capacity is not None)
    assert catalogue_description()[IDS.index(model_id)]["has_saturation_capacity"] == (
        case.capacity is not None)
    if case.capacity is None:
        assert model.saturation_capacity(np.ones((1, len(model.params)))) is None
        if not model.relative_pressure:
            # no plateau: the loading keeps rising by at least as much per decade
            # far above any data (Temkin by exactly RT/b ln 10 each decade)
            params = case.truths[0][1]
            q = [_q(model, p, 298.15, params) for p in (1e20, 1e30, 1e40)]
            assert q[2] - q[1] >= (1 - 1e-9) * (q[1] - q[0]) > 0
        return
    params, expected = case.capacity
    assert model.saturation_capacity(np.array([params]))[0] == expected
    if model.pore_filling:
        # the filled micropores: the loading at p0, approached from below
        assert _q(model, 1.0, 77.35, params) == expected
        assert _q(model, 0.99, 77.35, params) < expected
    else:
        # at b p = 1e60 every monolayer model sits within 1e-12 of its plateau
        affinities = [v for name, v in zip(model.param_names(), params) if "affinity" in name]
        assert _q(model, 1e60 / min(affinities), 298.15, params) == pytest.approx(expected,
                                                                                rel=1e-9)


CLOSED_FORM = [m.id for m in _MODELS if m.has_closed_form_spreading_pressure()]


@pytest.mark.parametrize("model_id", CLOSED_FORM)
def test_closed_form_spreading_pressure_equals_numerical_quadrature(model_id):
    # psi(p) = integral_0^p q(t)/t dt (Myers & Prausnitz 1965), by scipy.integrate.quad
    # in ln t so the decades weigh alike; 1e-3 Pa puts b p far below 1, where
    # a closed form built from differences of large terms loses its digits
    model, case = get_model(model_id), BY_ID[model_id]
    for temperature_k, params in case.truths:
        for p in (1e-3, 1e2, 1e4, 1e6):
            closed = float(model.reduced_spreading_pressure(np.array([p]), *map(np.array, params))[0])

            def integrand(ln_t):
                return _q(model, np.exp(ln_t), temperature_k, params)

            numeric, _ = quad(integrand, np.log(p) - 120.0, np.log(p), limit=400,
                              epsabs=0.0, epsrel=1e-12)
            assert closed == pytest.approx(numeric, rel=1e-8, abs=0.0), (params, p)


def test_dual_site_canonical_order_puts_the_stronger_site_first():
    model = get_model("dual_site_langmuir")
    fitted = np.array([[4.0, 1e-5, 1.0, 1e-3],    # weaker site listed first
                       [1.0, 1e-3, 4.0, 1e-5]])   # already canonical
    out = model.canonical(fitted)
    np.testing.assert_array_equal(out, [[1.0, 1e-3, 4.0, 1e-5], [1.0, 1e-3, 4.0, 1e-5]])
    x = PRESSURE_PA[None, :]
    t = np.array([[298.15]])
    # the same isotherm either way round
    np.testing.assert_allclose(model.evaluate(x, t, *_columns(fitted[:1])),
                               model.evaluate(x, t, *_columns(out[:1])), rtol=1e-15)


# --- the straight-line helpers behind the seeds ------------------------------
def test_masked_fits_match_numpy_polyfit_on_the_real_points():
    rng = np.random.default_rng(3)
    x = rng.uniform(0.0, 1.0, size=(5, 12))
    y = rng.normal(size=(5, 12))
    mask = np.ones_like(x, dtype=bool)
    mask[1, 8:] = False
    slope, intercept, used = masked_linear_fit(x, y, mask)
    a, b, c = masked_quadratic_fit(x, y, mask)
    for i in range(5):
        keep = mask[i]
        # numpy.polyfit: the general-purpose reference for polynomial least squares
        np.testing.assert_allclose([slope[i], intercept[i]], np.polyfit(x[i, keep], y[i, keep], 1),
                                   rtol=1e-10)
        np.testing.assert_allclose([a[i], b[i], c[i]], np.polyfit(x[i, keep], y[i, keep], 2),
                                   rtol=1e-8)
    assert used[1] == 8


def test_masked_quadratic_fit_is_nan_with_fewer_than_three_distinct_points():
    x = np.array([[1.0, 1.0, 2.0, 2.0]])
    a, b, c = masked_quadratic_fit(x, np.array([[1.0, 1.0, 3.0, 3.0]]), np.ones_like(x, bool))
    assert np.isnan(a[0]) and np.isnan(b[0]) and np.isnan(c[0])


@pytest.mark.parametrize("model_id", [c.model_id for c in CASES if c.through_origin])
def test_zero_pressure_gives_zero_loading_and_finite_derivatives(model_id):
    # every model so marked passes through the origin (Temkin's ln(a p) does not)
    model = CATALOGUE[model_id]
    temperature_k, params = BY_ID[model_id].truths[0]
    x = np.array([[0.0, _grid(model)[0]]])
    args = (x, np.array([[temperature_k]]), *[np.array([[v]]) for v in params])
    with np.errstate(all="raise"):
        q = model.evaluate(*args)
        jac = model.jacobian(*args)
    assert q[0, 0] == 0.0 and q[0, 1] > 0.0
    assert all(np.all(np.isfinite(d)) and d[0, 0] == 0.0 for d in jac)


def test_clipping_keeps_tiny_log_scale_values_and_pulls_others_inside():
    langmuir, gab = get_model("langmuir"), get_model("gab")
    # an affinity of 1e-12 1/Pa (hydrogen-like) must survive: the margin is relative
    clipped = langmuir.clip_to_bounds(np.array([[2.0, 1e-12], [-1.0, 0.0]]))
    assert clipped[0, 1] == 1e-12
    assert clipped[1, 0] > 0.0 and clipped[1, 1] > 0.0
    inside = gab.clip_to_bounds(np.array([[1.0, 1e9, 1.0], [1.0, 0.0, 0.0]]))
    assert np.all(inside > gab.lower_bounds()) and np.all(inside < gab.upper_bounds())
