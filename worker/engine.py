"""Vectorised bounded least squares: one model fitted to a whole batch at once.

The solver is a projected Levenberg-Marquardt method run on every
(isotherm, seed) row simultaneously. Arrays are (rows, points) with a mask
for unequal point counts; the k x k normal equations (k <= 4 for the
catalogue) are solved row-wise by a Cholesky factorisation written over the
batch axis, so no Python loop runs per isotherm.

Conditioning: a parameter the model marks ``log_scale`` is iterated as its
logarithm, so a relative change of an affinity of 1e-6 1/Pa and of a
capacity of 5 mol/kg look alike to the solver; the normal equations are
further Jacobi-scaled (Marquardt's diagonal), which makes the damped step
independent of parameter units. Everything reported (parameters, covariance,
bounds flags) is in the model's own parameters and units.

Bounds are kept by projection: a trial point is clipped into the box, and a
parameter sitting on a bound whose gradient pushes outward is frozen for
that step (a projected Newton active set).

Stopping: a row stops when the Gauss-Newton step from its current point
would lower the SSE by less than ``GN_REL_TOL`` of the SSE (the squared
cosine between residual and Jacobian range). That quantity is computed
directly, not as a difference of two SSEs, so it reaches far below machine
precision of the SSE itself and pins parameters to ~1e-10 relative.
"""
from __future__ import annotations

import logging

import numpy as np
from scipy import stats

from .models import CATALOGUE, IsothermModel
from .packing import Packed
from .results import ModelFits

log = logging.getLogger(__name__)

WEIGHTINGS = ("uniform", "relative", "sigma")

GN_REL_TOL = 1e-18      # Gauss-Newton predicted reduction / SSE at which a row has converged
EXACT_REL_TOL = 1e-28   # SSE / sum(w q^2) below which the data are fitted exactly
POLISH_REL_TOL = 1e-8  # below this GN reduction / SSE the solver is in the quadratic regime
LOOSE_REL_TOL = 1e-10   # accepted instead of GN_REL_TOL when rounding stops all progress
RELATIVE_SIGMA_FLOOR = 1e-3  # "relative": loadings under this share of the row max use the floor
MAX_ITER = 200
INFLUENCE_RTOL = 1e-8   # a parameter moving the curve less than this (relative) is undetermined
PIVOT_RTOL = 1e-13      # Cholesky pivot / original diagonal below this = singular
MAX_DAMPING = 1e16

# row status codes inside the solver
_RUNNING, _CONVERGED, _MAX_ITER, _SINGULAR, _NONFINITE, _STALLED = range(6)
_STATUS_REASON = np.array([
    "running",
    "converged",
    "max iterations",
    "singular jacobian",
    "non-finite model values",
    "stalled: no step lowers the sum of squares",
], dtype=object)


# --------------------------------------------------------------------------
# public API

def fit_models(packed: Packed, models="all", weighting: str = "uniform") -> dict[str, ModelFits]:
    """Fit each model to every isotherm of ``packed``; return {model id: ModelFits}.

    ``models`` is "all" (the whole catalogue) or a list of model ids or classes.
    """
    if weighting not in WEIGHTINGS:
        raise ValueError(f"weighting must be one of {', '.join(WEIGHTINGS)}; got {weighting!r}")
    out = {}
    for model in resolve_models(models):
        try:
            out[model.id] = fit_model(model, packed, weighting)
        except Exception as exc:  # noqa: BLE001 - one broken model must not sink the others
            log.exception("model %s failed on the whole batch", model.id)
            fits = _empty_fits(model, packed.n, packed.n_points, np.ones(packed.n, dtype=bool))
            fits.reason[:] = f"internal error: {type(exc).__name__}: {exc}"
            out[model.id] = fits
    return out


def resolve_models(models="all") -> list[type[IsothermModel]]:
    """Model classes named by "all", a comma string, or a list of ids/classes."""
    if isinstance(models, str):
        if models == "all":
            return list(CATALOGUE.values())
        models = [s.strip() for s in models.split(",") if s.strip()]
    out = []
    for m in models:
        if isinstance(m, str):
            if m not in CATALOGUE:
                raise KeyError(f"unknown model {m!r}; known models: {', '.join(sorted(CATALOGUE))}")
            m = CATALOGUE[m]
        out.append(m)
    return out


def fit_model(model: type[IsothermModel], packed: Packed, weighting: str = "uniform",
              *, max_iter: int = MAX_ITER) -> ModelFits:
    """Fit one model to every isotherm in ``packed``; return its ModelFits.

    weighting:
      "uniform"  ordinary least squares (every point weight 1);
      "relative" sigma proportional to loading, i.e. relative errors; loadings
                 below 0.1 % of the isotherm's largest use that floor so zero
                 loadings do not get infinite weight;
      "sigma"    the per-point sigma (mol/kg) the isotherm came with; isotherms
                 without sigma fall back to uniform weights.
    ``sse`` is the weighted sum of squares sum(((q_model - q) / sigma)^2);
    ``rmse`` is the unweighted root mean square residual in mol/kg; ``r2`` is
    the weighted coefficient of determination.

    Information criteria (Hurvich & Tsai 1989; Schwarz 1978; Burnham &
    Anderson 2002), with n the isotherm's point count and K = n_params + 1:
    **K counts the error variance** as one estimated parameter.
      AIC  = n ln(SSE/n) + 2K
      AICc = AIC + 2K(K+1)/(n-K-1)   (inf when n-K-1 <= 0)
      BIC  = n ln(SSE/n) + K ln n
    The additive constant n(ln 2pi + 1) of the Gaussian log-likelihood is
    omitted; it is the same for every model of one isotherm.

    Covariance = (J^T W J)^-1 * SSE/(n-k) in the model's own parameters, k =
    n_params; ci95 uses Student's t with n-k degrees of freedom. Every row
    gets a reason; rows never fitted (not applicable, too few points) have nan
    statistics, rows whose fit did not converge keep their last parameters
    and statistics for inspection, with converged False.
    """
    if weighting not in WEIGHTINGS:
        raise ValueError(f"weighting must be one of {', '.join(WEIGHTINGS)}; got {weighting!r}")
    n = packed.n
    k = len(model.params)
    mask = packed.mask
    q = packed.loading_mol_per_kg
    if model.relative_pressure:
        with np.errstate(divide="ignore", invalid="ignore"):
            x = packed.relative_pressure
    else:
        x = packed.pressure_pa
    sigma = _sigma_mol_per_kg(packed, weighting)

    reason = np.full(n, "", dtype=object)
    applicable = np.ones(n, dtype=bool)
    if model.relative_pressure:
        p0 = packed.saturation_pressure_pa
        no_p0 = ~(np.isfinite(p0) & (p0 > 0))
        reason[no_p0] = "not applicable: no saturation pressure"
        over = ~no_p0 & np.any(mask & ~(x < 1.0), axis=1)
        reason[over] = "not applicable: p/p0 >= 1"
        applicable = ~(no_p0 | over)
    todo = reason == ""
    bad_data = todo & np.any(mask & ~(np.isfinite(x) & np.isfinite(q)), axis=1)
    reason[bad_data] = "non-finite data"
    bad_sigma = todo & ~bad_data & np.any(mask & ~(np.isfinite(sigma) & (sigma > 0)), axis=1)
    reason[bad_sigma] = "invalid sigma"
    blank = (reason == "") & ~np.any(mask & (q != 0), axis=1)
    reason[blank] = "degenerate data: every loading is zero"
    few = (reason == "") & (packed.n_points <= k)
    reason[few] = f"too few points: need at least {k + 1}"

    out = _empty_fits(model, n, packed.n_points, applicable)
    rows = np.flatnonzero(reason == "")
    out.reason[:] = reason
    if rows.size == 0:
        return out

    with np.errstate(divide="ignore", invalid="ignore"):  # bad-sigma rows are already out
        weight = np.where(mask, 1.0 / np.where(mask, sigma, 1.0) ** 2, 0.0)
    xs, qs, ws, ms = x[rows], q[rows], weight[rows], mask[rows]
    xs = np.where(ms, xs, _last_real(xs, ms))  # padding stays an in-range copy
    ts = packed.temperature_k[rows][:, None]

    params, status = _fit_rows(model, xs, qs, ws, ms, ts, max_iter)
    params = model.canonical(params)
    _fill_statistics(out, model, rows, params, status, xs, qs, ws, ms, ts)
    return out


# --------------------------------------------------------------------------
# weights

def _sigma_mol_per_kg(packed: Packed, weighting: str) -> np.ndarray:
    """Per-point standard deviation (n, m) for the chosen weighting."""
    q = packed.loading_mol_per_kg
    if weighting == "relative":
        q_abs = np.where(packed.mask, np.abs(q), 0.0)
        floor = RELATIVE_SIGMA_FLOOR * q_abs.max(axis=1, keepdims=True)
        floor = np.where(floor > 0, floor, 1.0)
        return np.maximum(q_abs, floor)
    if weighting == "sigma" and packed.sigma_mol_per_kg is not None:
        s = packed.sigma_mol_per_kg
        # pack() marks isotherms without sigma by a whole nan row
        no_sigma = np.all(np.isnan(s) | ~packed.mask, axis=1)
        return np.where(no_sigma[:, None], 1.0, s)
    return np.ones_like(q)


def _last_real(values: np.ndarray, mask: np.ndarray) -> np.ndarray:
    last = np.maximum(mask.sum(axis=1) - 1, 0)
    return values[np.arange(values.shape[0]), last][:, None]


# --------------------------------------------------------------------------
# the solver

class _Transform:
    """Fitted coordinates theta: log(p) for log_scale params, p otherwise."""

    def __init__(self, model):
        lo, hi = model.lower_bounds(), model.upper_bounds()
        self.log = np.array([p.log_scale and p.lower >= 0 for p in model.params])
        with np.errstate(divide="ignore"):
            self.lo = np.where(self.log, np.log(np.maximum(lo, 0.0)), lo)
            self.hi = np.where(self.log, np.log(hi), hi)

    def to_theta(self, p):
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.log, np.log(np.maximum(p, 1e-300)), p)

    def to_params(self, theta):
        with np.errstate(over="ignore"):
            return np.where(self.log, np.exp(theta), theta)


def _fit_rows(model, x, q, w, mask, t, max_iter):
    """Best-of-seeds fit for each row; returns params (n, k) and status (n,)."""
    n = x.shape[0]
    seeds = np.asarray(model.initial_guesses(x, q, mask, t), dtype=float)
    n_seeds, k = seeds.shape[0], seeds.shape[-1]
    seeds = model.clip_to_bounds(seeds.reshape(n_seeds * n, k))
    src = np.tile(np.arange(n), n_seeds)  # row of each (seed, isotherm)
    params, sse, status = _levenberg_marquardt(model, seeds, x, q, w, mask, t, src, max_iter)

    # per isotherm: lowest SSE among converged seeds, else lowest SSE overall
    rank = np.where(np.isfinite(sse), sse, np.inf)
    rank = np.where(status == _CONVERGED, rank, np.inf)
    fallback = np.where(np.isfinite(sse), sse, np.inf)
    rank = rank.reshape(n_seeds, n)
    fallback = fallback.reshape(n_seeds, n)
    any_conv = np.isfinite(rank).any(axis=0)
    pick = np.where(any_conv, np.argmin(rank, axis=0), np.argmin(fallback, axis=0))
    flat = pick * n + np.arange(n)
    return params[flat], status[flat]


def _evaluate(model, tr, theta, x, q, sw, t):
    """At ``theta`` (fitted coords): SSE, A = Jt W J, g = Jt W r, the rounding
    noise of the SSE, and whether all of it is finite.

    ``sw`` = sqrt(weight), 0 at padding points (which repeat a real point, so
    the model is finite there whenever it is finite on the real points).
    """
    p = tr.to_params(theta)
    cols = [p[:, j:j + 1] for j in range(p.shape[1])]
    with np.errstate(all="ignore"):
        f = model.evaluate(x, t, *cols)
        jac = model.jacobian(x, t, *cols)
        r = sw * (f - q)
        sse = np.einsum("ij,ij->i", r, r)
        # rounding of f (relative eps) moves the SSE by up to 2 sum |r| eps |f|
        # <= 2 eps sqrt(sse * sum (sw f)^2) (Cauchy-Schwarz); 4x margin
        swf = sw * f
        noise = 8.0 * np.finfo(float).eps * np.sqrt(sse * np.einsum("ij,ij->i", swf, swf))
        jw = [(sw * pj if lg else sw) * d for d, pj, lg in zip(jac, cols, tr.log)]
        k = len(jw)
        a = np.empty((x.shape[0], k, k))
        g = np.empty((x.shape[0], k))
        for i in range(k):
            g[:, i] = np.einsum("ij,ij->i", jw[i], r)
            for j in range(i + 1):
                a[:, i, j] = a[:, j, i] = np.einsum("ij,ij->i", jw[i], jw[j])
    finite = np.isfinite(sse) & np.isfinite(a).all(axis=(1, 2)) & np.isfinite(g).all(axis=1)
    return sse, a, g, noise, finite


def _levenberg_marquardt(model, theta0_params, x, q, w, mask, t, src, max_iter):
    """Run LM on rows ``src`` (indices into x, q, ...) from the given params.

    Returns params (N, k), sse (N,), status (N,) for the N = len(src) rows.
    """
    tr = _Transform(model)
    n_rows, k = theta0_params.shape
    theta = tr.to_theta(theta0_params)
    theta = np.clip(theta, tr.lo, tr.hi)
    status = np.full(n_rows, _RUNNING)
    sse = np.full(n_rows, np.inf)
    exact = EXACT_REL_TOL * np.einsum("ij,ij->i", w * q, q)[src]

    sw = np.sqrt(w)  # w is 0 at padding

    def data(rows):
        s = src[rows]
        return x[s], q[s], sw[s], t[s]

    act = np.arange(n_rows)
    d = data(act)
    sse_a, a_mat, g, noise, finite = _evaluate(model, tr, theta, *d)
    sse[:] = sse_a
    status[~finite] = _NONFINITE
    lam = np.full(n_rows, 1e-3)
    nu = np.full(n_rows, 2.0)
    diag_max = np.abs(np.diagonal(a_mat, axis1=1, axis2=2)).copy()  # Marquardt scale: running max
    keep = finite
    act, a_mat, g, noise = act[keep], a_mat[keep], g[keep], noise[keep]
    d = tuple(v[keep] for v in d)

    for _ in range(max_iter):
        if act.size == 0:
            break
        th, lo, hi = theta[act], tr.lo, tr.hi
        # projected active set: on a bound with descent pointing outward
        fixed = ((th <= lo) & (g > 0)) | ((th >= hi) & (g < 0))
        free = ~fixed
        gf = np.where(free, g, 0.0)
        af = _restrict(a_mat, free)

        # convergence: predicted reduction of the undamped (Gauss-Newton) step
        dscale = np.sqrt(np.maximum(np.diagonal(af, axis1=1, axis2=2), 1e-300))
        gn, ok_gn = _cholesky_solve(af / (dscale[:, :, None] * dscale[:, None, :]), -gf / dscale)
        pred_gn = -np.einsum("ij,ij->i", gf / dscale, gn)
        s_cur = sse[act]
        done = ok_gn & (pred_gn <= GN_REL_TOL * s_cur + exact[act])
        done |= s_cur <= exact[act]
        status[act[done]] = _CONVERGED
        if done.any():  # converged rows leave before the costly trial evaluation
            keep = ~done
            act, a_mat, g, noise = act[keep], a_mat[keep], g[keep], noise[keep]
            d = tuple(v[keep] for v in d)
            th, free, gf, af = th[keep], free[keep], gf[keep], af[keep]
            ok_gn, pred_gn, s_cur = ok_gn[keep], pred_gn[keep], s_cur[keep]
            if act.size == 0:
                break

        # damped, Jacobi-scaled step
        dm = np.maximum(diag_max[act], np.diagonal(af, axis1=1, axis2=2))
        diag_max[act] = dm
        ds = np.sqrt(np.where(dm > 0, dm, 1.0))
        a_s = af / (ds[:, :, None] * ds[:, None, :])
        a_s = a_s + lam[act][:, None, None] * np.eye(k)
        step_s, ok = _cholesky_solve(a_s, -gf / ds)
        step = np.where(free, step_s / ds, 0.0)
        trial = np.clip(th + step, lo, hi)
        step = trial - th
        pred = -(2.0 * np.einsum("ij,ij->i", step, g) + np.einsum("ij,ijk,ik->i", step, a_mat, step))

        sse_t, a_t, g_t, noise_t, fin_t = _evaluate(model, tr, trial, *d)
        # Close to the minimum SSE differences drown in rounding; there a step
        # that shrinks the (scaled) gradient without raising the SSE beyond its
        # rounding noise is progress too.
        polish = ok_gn & (pred_gn <= POLISH_REL_TOL * s_cur)
        gt_f = np.where(free, g_t, 0.0) / ds
        shrinks = np.einsum("ij,ij->i", gt_f, gt_f) < np.einsum("ij,ij->i", gf / ds, gf / ds)
        better = fin_t & ok & (
            (sse_t < s_cur) | (polish & (sse_t <= s_cur + noise) & shrinks))
        with np.errstate(divide="ignore", invalid="ignore"):
            rho = np.where(pred > 0, (s_cur - sse_t) / pred, 0.0)
        lam_a, nu_a = lam[act], nu[act]
        lam_a = np.where(better, lam_a * np.maximum(1.0 / 3.0, 1.0 - (2.0 * rho - 1.0) ** 3),
                         lam_a * nu_a)
        nu_a = np.where(better, 2.0, nu_a * 2.0)
        lam[act], nu[act] = lam_a, nu_a
        theta[act[better]] = trial[better]
        sse[act[better]] = sse_t[better]
        a_mat = np.where(better[:, None, None], a_t, a_mat)
        g = np.where(better[:, None], g_t, g)
        noise = np.where(better, noise_t, noise)

        # no representable step lowers the SSE any more
        stuck = ~better & (lam_a > MAX_DAMPING)
        near = ok_gn & (pred_gn <= LOOSE_REL_TOL * s_cur + exact[act])
        status[act[stuck & near]] = _CONVERGED
        status[act[stuck & ~near & ~ok_gn]] = _SINGULAR
        status[act[stuck & ~near & ok_gn]] = _STALLED

        running = status[act] == _RUNNING
        if not running.all():
            act, a_mat, g, noise = act[running], a_mat[running], g[running], noise[running]
            d = tuple(v[running] for v in d)

    if act.size:
        # out of iterations: say singular if the normal matrix is
        fixed = ((theta[act] <= tr.lo) & (g > 0)) | ((theta[act] >= tr.hi) & (g < 0))
        af = _restrict(a_mat, ~fixed)
        dscale = np.sqrt(np.maximum(np.diagonal(af, axis1=1, axis2=2), 1e-300))
        _, ok_gn = _cholesky_solve(af / (dscale[:, :, None] * dscale[:, None, :]), np.zeros((act.size, k)))
        status[act] = np.where(ok_gn, _MAX_ITER, _SINGULAR)
    return tr.to_params(theta), sse, status


def _restrict(a_mat, free):
    """Normal matrix with frozen parameters decoupled (identity rows/cols)."""
    both = free[:, :, None] & free[:, None, :]
    eye = np.eye(a_mat.shape[1], dtype=bool)[None]
    return np.where(both, a_mat, np.where(eye, 1.0, 0.0))


def _cholesky_solve(a_mat, b):
    """Solve a x = b for a stack of symmetric positive definite k x k matrices.

    Returns (x (n, k), ok (n,)); ok is False where a pivot falls below
    PIVOT_RTOL of its diagonal (numerically singular), and x is 0 there.
    """
    n, k = b.shape
    low = np.zeros_like(a_mat)
    ok = np.ones(n, dtype=bool)
    for j in range(k):
        piv = a_mat[:, j, j] - np.einsum("ij,ij->i", low[:, j, :j], low[:, j, :j])
        good = np.isfinite(piv) & (piv > PIVOT_RTOL * np.abs(a_mat[:, j, j])) & (piv > 0)
        ok &= good
        low[:, j, j] = np.sqrt(np.where(good, piv, 1.0))
        for i in range(j + 1, k):
            dot = np.einsum("ij,ij->i", low[:, i, :j], low[:, j, :j])
            low[:, i, j] = (a_mat[:, i, j] - dot) / low[:, j, j]
    y = np.empty((n, k))
    for i in range(k):
        y[:, i] = (b[:, i] - np.einsum("ij,ij->i", low[:, i, :i], y[:, :i])) / low[:, i, i]
    sol = np.empty((n, k))
    for i in reversed(range(k)):
        sol[:, i] = (y[:, i] - np.einsum("ij,ij->i", low[:, i + 1:, i], sol[:, i + 1:])) / low[:, i, i]
    return np.where(ok[:, None] & np.isfinite(sol), sol, 0.0), ok


# --------------------------------------------------------------------------
# statistics of the chosen fits

def _empty_fits(model, n, n_points, applicable) -> ModelFits:
    k = len(model.params)
    nan = lambda *shape: np.full(shape, np.nan)  # noqa: E731
    return ModelFits(
        model_id=model.id, param_names=model.param_names(),
        params=nan(n, k), stderr=nan(n, k), ci95_low=nan(n, k), ci95_high=nan(n, k),
        covariance=nan(n, k, k), sse=nan(n), rmse=nan(n), r2=nan(n),
        aic=nan(n), aicc=nan(n), bic=nan(n), n_params=k,
        converged=np.zeros(n, dtype=bool), reason=np.full(n, "", dtype=object),
        at_bound=np.zeros((n, k), dtype=bool), applicable=np.asarray(applicable, dtype=bool).copy(),
        n_points=np.asarray(n_points, dtype=np.int64).copy(),
    )


def _fill_statistics(out, model, rows, params, status, x, q, w, mask, t):
    """Write SSE, covariance, intervals and criteria for ``rows`` into ``out``."""
    k = params.shape[1]
    cols = [params[:, j:j + 1] for j in range(k)]
    with np.errstate(all="ignore"):
        f = model.evaluate(x, t, *cols)
        jac = [np.broadcast_to(d, x.shape) for d in model.jacobian(x, t, *cols)]
        resid = np.where(mask, f - q, 0.0)
        sse = np.einsum("ij,ij->i", w * resid, resid)
        n_pts = mask.sum(axis=1).astype(float)
        rmse = np.sqrt(np.einsum("ij,ij->i", resid, resid) / n_pts)
        w_sum = w.sum(axis=1)
        q_bar = (w * q).sum(axis=1) / w_sum
        dev = np.where(mask, q - q_bar[:, None], 0.0)
        sst = np.einsum("ij,ij->i", w * dev, dev)
        r2 = np.where(sst > 0, 1.0 - sse / sst, np.nan)

        jw = [np.where(mask, np.sqrt(w) * dj, 0.0) for dj in jac]
        a_mat = np.empty((x.shape[0], k, k))
        for i in range(k):
            for j in range(i + 1):
                a_mat[:, i, j] = a_mat[:, j, i] = np.einsum("ij,ij->i", jw[i], jw[j])
        dof = n_pts - k
        scale = np.sqrt(np.maximum(np.abs(np.diagonal(a_mat, axis1=1, axis2=2)), 1e-300))
        a_s = a_mat / (scale[:, :, None] * scale[:, None, :])
        inv_s = np.empty_like(a_mat)
        ok = np.isfinite(a_s).all(axis=(1, 2))
        a_s = np.where(ok[:, None, None], a_s, np.eye(k))
        for j in range(k):
            e = np.zeros((x.shape[0], k))
            e[:, j] = 1.0
            col, ok_j = _cholesky_solve(a_s, e)
            inv_s[:, :, j] = col
            ok &= ok_j
        cov = inv_s / (scale[:, :, None] * scale[:, None, :]) * (sse / dof)[:, None, None]
        stderr = np.sqrt(np.diagonal(cov, axis1=1, axis2=2))
        half = stats.t.ppf(0.975, dof)[:, None] * stderr

        big_k = k + 1  # the error variance counts as a parameter
        log_l = n_pts * np.log(sse / n_pts)
        aic = log_l + 2 * big_k
        corr_den = n_pts - big_k - 1
        safe_den = np.where(corr_den > 0, corr_den, 1.0)
        aicc = np.where(corr_den > 0, aic + 2.0 * big_k * (big_k + 1) / safe_den, np.inf)
        bic = log_l + big_k * np.log(n_pts)

    lo, hi = model.lower_bounds(), model.upper_bounds()
    at_bound = (params <= lo) | (params >= hi) | np.isclose(params, lo, rtol=1e-10, atol=0) \
        | np.isclose(params, hi, rtol=1e-10, atol=0)
    # A parameter whose 100 % change moves the curve by less than
    # INFLUENCE_RTOL of the data has run off to a limit (flat data drive a
    # Langmuir affinity to infinity; all-zero data any capacity to zero): the
    # SSE may be tiny, yet that parameter is not determined.
    with np.errstate(all="ignore"):
        influence = np.stack([np.sqrt(np.einsum("ij,ij->i", jw[j], jw[j])) * np.abs(params[:, j])
                              for j in range(k)], axis=1)
        data_norm = np.sqrt(np.einsum("ij,ij->i", w * q, q))
    inert = (influence <= INFLUENCE_RTOL * data_norm[:, None]).any(axis=1)
    # a parameter on a bound can make another irrelevant (an empty second
    # site's affinity); that fit did converge -- selection reports the bound
    undetermined = (~ok | inert) & ~at_bound.any(axis=1)
    status = np.where((status == _CONVERGED) & undetermined, _SINGULAR, status)
    finite = np.isfinite(sse) & np.isfinite(params).all(axis=1)
    status = np.where((status == _CONVERGED) & ~finite, _NONFINITE, status)

    out.params[rows] = params
    out.sse[rows] = sse
    out.rmse[rows] = rmse
    out.r2[rows] = r2
    out.aic[rows], out.aicc[rows], out.bic[rows] = aic, aicc, bic
    good_cov = ok[:, None, None]
    out.covariance[rows] = np.where(good_cov, cov, np.nan)
    out.stderr[rows] = np.where(ok[:, None], stderr, np.nan)
    out.ci95_low[rows] = np.where(ok[:, None], params - half, np.nan)
    out.ci95_high[rows] = np.where(ok[:, None], params + half, np.nan)
    out.at_bound[rows] = at_bound
    out.converged[rows] = status == _CONVERGED
    out.reason[rows] = _STATUS_REASON[status]
