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
precision of the SSE itself and pins parameters to ~1e-10 relative. A row
whose parameters run off towards a bound while the SSE keeps falling along
the way (a fit tending to a limiting model, which has no minimum at finite
parameters) is stopped early as drifting; see DRIFT_WINDOW.

Best scale: every catalogue model is homogeneous in its capacity-like
parameters (f(lambda^c p) = lambda f(p), Euler), so the least-squares scale of
a curve is known in closed form. While a row approaches its minimum, each
trial point is moved to its best scale before it is judged (a projection in
the spirit of variable projection, Golub & Pereyra 1973): the capacity-
affinity valley that makes plain Levenberg-Marquardt crawl is taken in one
step. Near the minimum (the quadratic regime) rows step plainly, so the
stopping test and the final polish are those of the unprojected problem.

Seeds: every isotherm is started from a few seeds (isotherm-major order, so
an isotherm's seeds enter the working set together and iterate in lockstep).
Most end in the same minimum; a seed that provably heads for the minimum a
sibling reaches with a lower SSE stops there (_merged_seeds), which leaves
the reported fit as it was and saves the duplicated polishing.
"""
from __future__ import annotations

import logging

import numpy as np
# scipy.special, not scipy.stats: the same quantile functions (stats.t.ppf and
# stats.norm.ppf call them) without the 0.5 s import of scipy.stats at every start
from scipy.special import chdtrc, stdtrit

from .interrupts import ends_job
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
# Seeds of one isotherm that head for the same minimum are merged (see
# _merged_seeds) once both are this close to it: Gauss-Newton predicted
# reduction / SSE, i.e. inside the quadratic regime (1e-6 and 1e-4 give the
# same fits on the scale benchmark's mix; 1e-3 changed one). MERGE_SEEDS =
# False runs every seed to its own end (the result is the same; it costs more).
MERGE_REL_TOL = 1e-4
MERGE_SEEDS = True
# trial points of the approach take their best scale (see the module notes);
# False is plain Levenberg-Marquardt throughout (same minima, more iterations)
PROJECT_SCALE = True
# damping: the start value on the Jacobi-scaled normal equations, and the
# most an accepted step may shrink it (Nielsen's update); other values were
# measured and saved no iterations (DEVELOPERS.md)
LAMBDA_INIT = 1e-3
LAMBDA_MIN_SHRINK = 1.0 / 3.0

# Drift: a row whose parameters run off towards a bound (a capacity to
# infinity, an affinity to zero, an exponent to its limit) while the SSE
# creeps towards that of a limiting model would use every iteration and still
# not converge. Every DRIFT_WINDOW iterations a row is a suspect when some
# parameter moved at least DRIFT_DECADES decades towards the same bound in each
# of the last two windows (decades of the parameter itself for a bound at 0 or
# infinity, of its distance to a finite bound otherwise) and it is not in the
# quadratic regime. A suspect is stopped only if the proof holds: the SSE keeps
# falling along the drift extrapolated 1, 2, 4, ... windows ahead (in log
# coordinates for positive parameters), at least as far as the remaining
# iterations could carry it at its present pace -- no minimum the solver could
# still reach lies on the way. Otherwise it simply iterates on. The row stops
# as not converged, its drifting parameters marked at_bound (the bound they
# run to is the fit's limit) and named in its reason.
# With the best-scale projection a drifting row runs off fast and then
# crawls; a window of 10 iterations and 0.02 decades per window stop such rows
# early without stopping any fit that converges (scale benchmark's mix).
DRIFT_WINDOW = 10
DRIFT_DECADES = 0.02

# row status codes inside the solver
_RUNNING, _CONVERGED, _MAX_ITER, _SINGULAR, _NONFINITE, _STALLED, _DRIFTING, _MERGED = range(8)
_STATUS_REASON = np.array([
    "running",
    "converged",
    "max iterations",
    "singular jacobian",
    "non-finite model values",
    "stalled: no step lowers the sum of squares",
    "parameter drifting to bound",  # completed with names and limits per row
    "merged: another seed of this isotherm reaches the same minimum with a lower sum of squares",
], dtype=object)


# --------------------------------------------------------------------------
# public API

def fit_models(packed: Packed, models="all", weighting: str = "uniform",
               absolute_sigma: bool = False) -> dict[str, ModelFits]:
    """Fit each model to every isotherm of ``packed``; return {model id: ModelFits}.

    ``models`` is "all" (the whole catalogue) or a list of model ids or classes;
    ``weighting`` and ``absolute_sigma`` as in ``fit_model``.
    """
    check_weighting(weighting, absolute_sigma)
    out = {}
    for model in resolve_models(models):
        try:
            out[model.id] = fit_model(model, packed, weighting, absolute_sigma=absolute_sigma)
        except Exception as exc:  # one broken model must not sink the others
            if ends_job(exc):
                raise
            log.exception("model %s failed on the whole batch", model.id)
            fits = _empty_fits(model, packed.n, packed.n_points, np.ones(packed.n, dtype=bool))
            fits.reason[:] = f"internal error: {type(exc).__name__}: {exc}"
            out[model.id] = fits
    return out


def check_weighting(weighting: str, absolute_sigma: bool = False) -> None:
    """Raise ValueError for an unknown weighting, or absolute sigma without sigma weights."""
    if weighting not in WEIGHTINGS:
        raise ValueError(f"weighting must be one of {', '.join(WEIGHTINGS)}; got {weighting!r}")
    if absolute_sigma and weighting != "sigma":
        raise ValueError("absolute sigma needs weighting 'sigma' (the calibrated sigma of each "
                         f"loading); got weighting {weighting!r}")


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
              *, absolute_sigma: bool = False, max_iter: int = MAX_ITER) -> ModelFits:
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
    n_params (n counts every point, replicates included); ci95 uses Student's
    t with n-k degrees of freedom. A parameter positive by nature
    (``Param.positive``) gets the log-scale interval of
    metrics.common.positive_interval_95, which never goes below zero.

    ``absolute_sigma`` (only with weighting "sigma"): the sigma an isotherm
    came with is calibrated, so the covariance is (J^T W J)^-1, not rescaled
    by SSE/(n-k); intervals use the normal quantile (the variance is known);
    ``chi_square`` = SSE with ``chi_square_dof`` = n-k and its upper-tail
    ``chi_square_p_value`` are reported. Isotherms without sigma keep the
    uniform, rescaled treatment and nan chi-square. Every row
    gets a reason; rows never fitted (not applicable, too few points) have nan
    statistics, rows whose fit did not converge keep their last parameters
    and statistics for inspection, with converged False.
    """
    check_weighting(weighting, absolute_sigma)
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
    calibrated = np.zeros(n, dtype=bool)
    if absolute_sigma and packed.sigma_mol_per_kg is not None:
        calibrated = ~_without_sigma(packed)

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
    xs, qs, ws, ms = _canonical_width(x[rows], q[rows], weight[rows], mask[rows])
    xs = np.where(ms, xs, _last_real(xs, ms))  # padding stays an in-range copy
    ts = packed.temperature_k[rows][:, None]

    params, status, _, drift = _fit_rows(model, xs, qs, ws, ms, ts, max_iter)
    params, drift = _canonical_with_flags(model, params, drift)
    _fill_statistics(out, model, rows, params, status, xs, qs, ws, ms, ts, drift,
                     calibrated=calibrated[rows])
    return out


def _canonical_with_flags(model, params, flags):
    """``model.canonical(params)``, and the per-parameter ``flags`` (n, k)
    permuted the same way (matched by value: canonical only reorders)."""
    out = model.canonical(params)
    if not flags.any():
        return out, flags
    n, k = params.shape
    moved = np.zeros_like(flags)
    used = np.zeros((n, k), dtype=bool)
    for i in range(k):
        matched = np.zeros(n, dtype=bool)
        for j in range(k):
            same = (params[:, j] == out[:, i]) | (np.isnan(params[:, j]) & np.isnan(out[:, i]))
            take = ~matched & ~used[:, j] & same
            moved[take, i] = flags[take, j]
            used[take, j] = True
            matched |= take
    return out, moved


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
        return np.where(_without_sigma(packed)[:, None], 1.0, packed.sigma_mol_per_kg)
    return np.ones_like(q)


def _without_sigma(packed: Packed) -> np.ndarray:
    """(n,) bool: the isotherm came without sigma (pack() marks it by a whole nan row)."""
    return np.all(np.isnan(packed.sigma_mol_per_kg) | ~packed.mask, axis=1)


# Row sums (einsum, np.sum) add a row's tail in a different order when the
# padded width changes (blocks of 8 vs a scalar remainder), so a row's last
# bits would depend on the longest isotherm it shares a batch with. Padding
# the point axis to a multiple of this width with zero-weight points makes
# every row's result independent of its company (chunked runs equal the
# serial run bit for bit).
POINT_AXIS_QUANTUM = 8


def _canonical_width(x, q, w, mask):
    """(x, q, w, mask) padded on the point axis to a multiple of POINT_AXIS_QUANTUM."""
    m = x.shape[1]
    extra = -m % POINT_AXIS_QUANTUM
    if extra == 0 or x.shape[0] == 0:
        return x, q, w, mask
    rep = lambda a: np.concatenate([a, np.repeat(a[:, -1:], extra, axis=1)], axis=1)  # noqa: E731
    return (rep(x), rep(q), np.concatenate([w, np.zeros((w.shape[0], extra))], axis=1),
            np.concatenate([mask, np.zeros((mask.shape[0], extra), dtype=bool)], axis=1))


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
    """Best-of-seeds fit for each row.

    Returns params (n, k), status (n,), iterations (n,) and drift (n, k): per
    parameter -1 / +1 where a drifting row's parameter runs to its lower /
    upper bound, else 0.
    """
    n = x.shape[0]
    seeds = np.asarray(model.initial_guesses(x, q, mask, t), dtype=float)
    n_seeds, k = seeds.shape[0], seeds.shape[-1]
    # isotherm-major order: the seeds of one isotherm are neighbours in the
    # solver's queue (row r is seed r % n_seeds of isotherm r // n_seeds)
    seeds = model.clip_to_bounds(np.swapaxes(seeds, 0, 1).reshape(n * n_seeds, k))
    src = np.repeat(np.arange(n), n_seeds)
    params, sse, status, iters, drift = _levenberg_marquardt(model, seeds, x, q, w, mask, t, src, max_iter)

    # per isotherm: lowest SSE among converged seeds, else lowest SSE overall
    # (ties: the earlier seed, as the seed rule ranked them); a drifting seed
    # counts as not converged, as it would have at the iteration cap
    fallback = np.where(np.isfinite(sse), sse, np.inf).reshape(n, n_seeds)
    rank = np.where(status.reshape(n, n_seeds) == _CONVERGED, fallback, np.inf)
    any_conv = np.isfinite(rank).any(axis=1)
    pick = np.where(any_conv, np.argmin(rank, axis=1), np.argmin(fallback, axis=1))
    flat = np.arange(n) * n_seeds + pick
    return params[flat], status[flat], iters[flat], drift[flat]


class _Evaluator:
    """SSE, normal matrix and gradient of a model at many rows at once.

    Layout: parameters, gradient and everything per row is batch-last --
    theta (k, R), g (k, R), the normal matrix a (k, k, R) -- so each entry
    a[i, j] is one contiguous vector and the k x k algebra below runs as a
    few dozen vector operations per iteration whatever R is.

    The Jacobian is evaluated once per trial point and, where the model
    allows, the model values come from it too: every catalogue model is
    homogeneous in its linear scale parameters (a capacity, a Henry slope,
    Temkin's b_t with degree -1), so by Euler's theorem
    f = sum_j c_j p_j df/dp_j with small integer c_j. ``euler`` holds those
    c_j after they were found and checked on the batch's own seeds (see
    ``_euler_coefficients``); otherwise (None) ``model.evaluate`` is called.
    """

    def __init__(self, model, tr, unit_weights, euler):
        self.model, self.tr, self.unit, self.euler = model, tr, unit_weights, euler
        self.k = len(model.params)
        # the Euler degrees as a column, for moving rows to their best scale
        self.degree = None if euler is None else np.asarray(euler, dtype=float)[:, None]

    def __call__(self, theta, x, swq, sw, t, project=None):
        """At ``theta`` (k, R): sse (R,), a (k, k, R), g (k, R), noise (R,),
        finite (R,) and theta itself (moved where ``project`` asks).

        ``swq``: the weighted loadings sqrt(w) q (q itself for unit weights),
        formed once per row by the caller. ``project`` (R,): rows moved to
        their best scale first (see _best_scale).
        """
        model, tr, k = self.model, self.tr, self.k
        p = _params_batch_last(tr, theta)
        cols = [p[j][:, None] for j in range(k)]
        shape = x.shape
        with np.errstate(all="ignore"):
            jac = model.jacobian(x, t, *cols)
            euler = self.euler
            # p_j df/dp_j: the derivative in log coordinates, and Euler's terms
            pd = [cols[j] * d if (tr.log[j] or (euler is not None and euler[j] != 0)) else d
                  for j, d in enumerate(jac)]
            if euler is not None:
                f = None
                for j, c in enumerate(euler):
                    if c != 0:
                        term = pd[j] if c == 1 else c * pd[j]
                        f = term if f is None else f + term
                f = np.broadcast_to(f, shape)
            else:
                f = model.evaluate(x, t, *cols)
            jw = [pd[j] if tr.log[j] else d for j, d in enumerate(jac)]
            if self.unit:
                swf = f
                jw = [np.broadcast_to(v, shape) for v in jw]
            else:
                swf = sw * f
                jw = [sw * v for v in jw]
            ff = np.einsum("ij,ij->i", swf, swf)
            col = None
            if euler is not None and PROJECT_SCALE and (project is None or project.any()):
                theta, lam, col = self._best_scale(theta, swf, swq, ff, project)
                r = lam[:, None] * swf - swq
                ff = lam * lam * ff
            else:
                r = swf - swq
            sse = np.einsum("ij,ij->i", r, r)
            # rounding of f (relative eps) moves the SSE by up to 2 sum |r| eps |f|
            # <= 2 eps sqrt(sse * sum (sw f)^2) (Cauchy-Schwarz); 4x margin
            noise = 8.0 * np.finfo(float).eps * np.sqrt(sse * ff)
            n_rows = shape[0]
            a = np.empty((k, k, n_rows))
            g = np.empty((k, n_rows))
            for i in range(k):
                g[i] = np.einsum("ij,ij->i", jw[i], r)
                for j in range(i + 1):
                    a[i, j] = np.einsum("ij,ij->i", jw[i], jw[j])
            if col is not None:
                # the Jacobian at the scaled point, column by column, from the one computed
                g *= col
                a *= col[:, None] * col[None, :]
            for i in range(k):
                for j in range(i):
                    a[j, i] = a[i, j]
        finite = np.isfinite(sse) & np.isfinite(a).all(axis=(0, 1)) & np.isfinite(g).all(axis=0)
        return sse, a, g, noise, finite, theta

    def _best_scale(self, theta, swf, swq, ff, project):
        """The least-squares scale lambda of the curve per row and the point it
        leads to: theta (k, R) moved to p_j lambda^c_j (f(p) -> lambda f(p),
        Euler), lambda (R,) (1 where no admissible scale exists), and the
        factor (k, R) each Jacobian column (in the solver's coordinates) takes
        there: lambda for log coordinates, lambda^(1 - c_j) for linear ones."""
        tr, c = self.tr, self.degree
        lam = np.einsum("ij,ij->i", swf, swq) / ff
        good = np.isfinite(lam) & (lam > 0)
        if project is not None:
            good &= project
        lam = np.where(good, lam, 1.0)
        scaled = np.where(tr.log[:, None], theta + c * np.log(lam), theta * lam ** c)
        good &= np.all((scaled >= tr.lo[:, None]) & (scaled <= tr.hi[:, None]), axis=0)
        lam = np.where(good, lam, 1.0)
        theta = np.where(good, scaled, theta)
        col = np.where(tr.log[:, None], lam, lam ** (1.0 - c))
        return theta, lam, col


def _euler_coefficients(model, tr, theta, x, t):
    """Integer c with f = sum_j c_j p_j df/dp_j at the probe rows, or None.

    Found by least squares on the probe and accepted only if the identity
    then holds to 1e-10 relative at every finite probe point.
    """
    k = len(model.params)
    p = _params_batch_last(tr, theta)
    cols = [p[j][:, None] for j in range(k)]
    with np.errstate(all="ignore"):
        f = np.broadcast_to(model.evaluate(x, t, *cols), x.shape)
        terms = [np.broadcast_to(cols[j] * d, x.shape) for j, d in enumerate(model.jacobian(x, t, *cols))]
    ok = np.isfinite(f) & np.all([np.isfinite(v) for v in terms], axis=0)
    if ok.sum() < 4 * k + 8:
        return None
    basis = np.stack([v[ok] for v in terms], axis=1)
    target = f[ok]
    scale = np.abs(basis).max(axis=0)
    if not np.all(np.isfinite(scale)):
        return None
    scale = np.where(scale > 0, scale, 1.0)
    with np.errstate(all="ignore"):
        c, *_ = np.linalg.lstsq(basis / scale, target, rcond=None)
    c = c / scale
    c_int = np.round(c)
    if not np.all(np.isfinite(c)) or np.any(np.abs(c - c_int) > 1e-6) or not np.any(c_int):
        return None
    recon = basis @ c_int
    tol = 1e-10 * (np.abs(target) + np.abs(basis) @ np.abs(c_int)) + 1e-300
    if not np.all(np.abs(recon - target) <= tol):
        return None
    return tuple(int(v) for v in c_int)


# rows (isotherm, seed) the solver holds at once: small enough that its
# (rows, points) arrays stay in cache, large enough that numpy's per-call
# overhead is amortised (see benchmarks/bench_engine.py --block)
ROW_BLOCK = 3072
_EULER_PROBE_ROWS = 256


def _levenberg_marquardt(model, theta0_params, x, q, w, mask, t, src, max_iter, block=None):
    """Run LM on rows ``src`` (indices into x, q, ...) from the given params.

    Returns params (N, k), sse (N,), status (N,) for the N = len(src) rows.

    Rows are independent; they stream through a working set of at most
    ``block`` rows: a row leaves it as soon as it has converged, stalled or
    used its ``max_iter`` iterations, and fresh rows from the queue top the
    working set up again, so the arrays stay compact and cache-sized.
    """
    block = int(block or ROW_BLOCK)
    tr = _Transform(model)
    n_rows, k = theta0_params.shape
    theta0 = np.clip(tr.to_theta(theta0_params), tr.lo, tr.hi)
    theta_out = theta0.copy()
    sse_out = np.full(n_rows, np.inf)
    status_out = np.full(n_rows, _RUNNING)
    iter_out = np.zeros(n_rows, dtype=np.int64)
    drift_out = np.zeros((n_rows, k), dtype=np.int8)
    exact_all = EXACT_REL_TOL * np.einsum("ij,ij->i", w * q, q)
    sw_all = np.sqrt(w)  # w is 0 at padding
    unit = bool(np.all(w == 1.0))  # no padding, uniform weights: skip sqrt(w) products
    swq_all = q if unit else sw_all * q  # weighted loadings, formed once per row
    lo, hi = tr.lo[:, None], tr.hi[:, None]

    probe = np.arange(min(n_rows, _EULER_PROBE_ROWS))
    euler = _euler_coefficients(model, tr, theta0[probe].T.copy(), x[src[probe]], t[src[probe]]) \
        if n_rows else None
    evaluate = _Evaluator(model, tr, unit, euler)

    # working set (batch-last per-row state; data row-major)
    rid = np.zeros(0, dtype=np.int64)
    theta = np.zeros((k, 0))
    sse = np.zeros(0)
    a_mat = np.zeros((k, k, 0))
    g = np.zeros((k, 0))
    noise = np.zeros(0)
    lam = np.zeros(0)
    nu = np.zeros(0)
    dmax = np.zeros((k, 0))
    it = np.zeros(0, dtype=np.int64)
    st = np.zeros(0, dtype=np.int64)
    exact = np.zeros(0)
    th1, th2 = np.zeros((k, 0)), np.zeros((k, 0))  # theta one and two drift windows ago
    xa = np.zeros((0,) + x.shape[1:])
    swqa, swa = xa.copy(), xa.copy()  # sqrt(w) q and sqrt(w) per row
    ta = np.zeros((0, 1))
    queued = 0
    # seeds of one isotherm are neighbours in src (isotherm-major order)
    group = int(np.bincount(src).max()) if n_rows and np.all(np.diff(src) >= 0) else 1
    pos = np.full(n_rows, -1, dtype=np.int64)  # row -> its place in the working set, -1 if out

    while True:
        # -- rows leave: stalled last time, out of iterations, or converged --
        running = st == _RUNNING
        out = running & (it >= max_iter)
        if out.any():
            fixed = ((theta[:, out] <= lo) & (g[:, out] > 0)) | ((theta[:, out] >= hi) & (g[:, out] < 0))
            _, ok_gn, _ = _gauss_newton(a_mat[:, :, out], g[:, out], ~fixed)
            st[out] = np.where(ok_gn, _MAX_ITER, _SINGULAR)
        check = running & ~out
        free = ~(((theta <= lo) & (g > 0)) | ((theta >= hi) & (g < 0)))
        gn_ok, pred_gn = np.zeros(st.size, bool), np.zeros(st.size)
        if check.any():
            _, gn_ok, pred_gn = _gauss_newton(a_mat, g, free)
            done = check & ((gn_ok & (pred_gn <= GN_REL_TOL * sse + exact)) | (sse <= exact))
            st[done] = _CONVERGED
            if MERGE_SEEDS and group > 1:
                near = (st == _RUNNING) & gn_ok & (pred_gn <= MERGE_REL_TOL * sse)
                if near.any():
                    pos[rid] = np.arange(rid.size)
                    st[_merged_seeds(rid, src, group, pos, st, near, theta, sse, a_mat, pred_gn,
                                     theta_out, sse_out, status_out)] = _MERGED
        # -- drift: every DRIFT_WINDOW iterations --
        at_mark = (it % DRIFT_WINDOW == 0) & (st == _RUNNING)
        if at_mark.any():
            suspect = at_mark & (it >= 2 * DRIFT_WINDOW) & ~(gn_ok & (pred_gn <= POLISH_REL_TOL * sse))
            if suspect.any():
                idx = np.flatnonzero(suspect)
                drifting, direction = _drift_proof(
                    model, tr, theta[:, idx], th1[:, idx], th2[:, idx], sse[idx],
                    xa[idx], swqa[idx], swa[idx], ta[idx], evaluate.unit, evaluate.euler,
                    (max_iter - it[idx]) / DRIFT_WINDOW)
                hit = idx[drifting]
                st[hit] = _DRIFTING
                drift_out[rid[hit]] = direction[:, drifting].T
            th2[:, at_mark] = th1[:, at_mark]
            th1[:, at_mark] = theta[:, at_mark]
        keep = st == _RUNNING
        if not keep.all():
            gone = ~keep
            pos[rid[gone]] = -1
            theta_out[rid[gone]] = theta[:, gone].T
            sse_out[rid[gone]] = sse[gone]
            status_out[rid[gone]] = st[gone]
            iter_out[rid[gone]] = it[gone]
            rid, theta, sse, a_mat, g, noise = rid[keep], theta[:, keep], sse[keep], a_mat[:, :, keep], \
                g[:, keep], noise[keep]
            lam, nu, dmax, it, st, exact = lam[keep], nu[keep], dmax[:, keep], it[keep], st[keep], exact[keep]
            th1, th2 = th1[:, keep], th2[:, keep]
            xa, swqa, swa, ta = xa[keep], swqa[keep], swa[keep], ta[keep]
            free, gn_ok, pred_gn = free[:, keep], gn_ok[keep], pred_gn[keep]

        # -- fresh rows from the queue top the working set up --
        if queued < n_rows and rid.size <= block - block // 4:
            end = min(n_rows, queued + block - rid.size)
            if end < n_rows and src[end] == src[end - 1]:
                # the seeds of one isotherm start together, so they can be
                # compared at equal iteration counts whatever the batch
                start_of_group = int(np.searchsorted(src, src[end], side="left"))
                end = start_of_group if start_of_group > queued else \
                    int(np.searchsorted(src, src[end], side="right"))
            new = np.arange(queued, end)
            queued = new[-1] + 1
            s = src[new]
            th_n = theta0[new].T.copy()
            x_n, swq_n, sw_n, t_n = x[s], swq_all[s], sw_all[s], t[s]
            sse_n, a_n, g_n, noise_n, fin, th_n = evaluate(th_n, x_n, swq_n, sw_n, t_n)
            sse_out[new] = sse_n
            status_out[new[~fin]] = _NONFINITE
            if not fin.all():
                new, th_n, sse_n, a_n, g_n, noise_n = new[fin], th_n[:, fin], sse_n[fin], a_n[:, :, fin], \
                    g_n[:, fin], noise_n[fin]
                x_n, swq_n, sw_n, t_n = x_n[fin], swq_n[fin], sw_n[fin], t_n[fin]
            m = new.size
            if m:
                free_n = ~(((th_n <= lo) & (g_n > 0)) | ((th_n >= hi) & (g_n < 0)))
                _, ok_n, pred_n = _gauss_newton(a_n, g_n, free_n)
                exact_n = exact_all[src[new]]
                st_n = np.full(m, _RUNNING)
                if max_iter <= 0:
                    fixed_n = ~free_n
                    st_n[:] = np.where(_gauss_newton(a_n, g_n, ~fixed_n)[1], _MAX_ITER, _SINGULAR)
                else:
                    done_n = (ok_n & (pred_n <= GN_REL_TOL * sse_n + exact_n)) | (sse_n <= exact_n)
                    st_n[done_n] = _CONVERGED
                fresh = st_n == _RUNNING
                if not fresh.all():
                    gone = ~fresh
                    theta_out[new[gone]] = th_n[:, gone].T
                    status_out[new[gone]] = st_n[gone]
                cat = lambda old, add, axis=0: np.concatenate([old, add], axis=axis)  # noqa: E731
                f_ = fresh
                rid = cat(rid, new[f_])
                theta = cat(theta, th_n[:, f_], 1)
                sse = cat(sse, sse_n[f_])
                a_mat = cat(a_mat, a_n[:, :, f_], 2)
                g = cat(g, g_n[:, f_], 1)
                noise = cat(noise, noise_n[f_])
                lam = cat(lam, np.full(f_.sum(), LAMBDA_INIT))
                nu = cat(nu, np.full(f_.sum(), 2.0))
                dmax = cat(dmax, np.abs(np.diagonal(a_n, axis1=0, axis2=1).T[:, f_]), 1)
                it = cat(it, np.zeros(f_.sum(), dtype=np.int64))
                th1, th2 = cat(th1, th_n[:, f_], 1), cat(th2, th_n[:, f_], 1)
                st = cat(st, st_n[f_])
                exact = cat(exact, exact_n[f_])
                xa, swqa, swa, ta = cat(xa, x_n[f_]), cat(swqa, swq_n[f_]), cat(swa, sw_n[f_]), cat(ta, t_n[f_])
                free, gn_ok, pred_gn = cat(free, free_n[:, f_], 1), cat(gn_ok, ok_n[f_]), cat(pred_gn, pred_n[f_])
        if rid.size == 0:
            if queued >= n_rows:
                break
            continue

        # -- damped, Jacobi-scaled step --
        # Close to the minimum SSE differences drown in rounding; there a step
        # that shrinks the (scaled) gradient without raising the SSE beyond its
        # rounding noise is progress too. Before that (the approach), the
        # trial point takes its best scale (see _Evaluator._best_scale).
        polish = gn_ok & (pred_gn <= POLISH_REL_TOL * sse)
        diag = np.diagonal(a_mat, axis1=0, axis2=1).T          # (k, R)
        diag_f = np.where(free, diag, 1.0)
        dmax = np.maximum(dmax, diag_f)
        ds = np.sqrt(np.where(dmax > 0, dmax, 1.0))
        gf_s = np.where(free, g, 0.0) / ds
        mat = _scaled_restricted(a_mat, free, ds)
        for j in range(k):
            mat[j][j] = mat[j][j] + lam
        step_s, ok = _cholesky_vectors(mat, -gf_s)
        step = np.where(free, step_s / ds, 0.0)
        trial = np.clip(theta + step, lo, hi)
        step = trial - theta
        quad = _dot_k(step, [_dot_k(a_mat[i], step) for i in range(k)])
        pred = -(2.0 * _dot_k(step, g) + quad)

        sse_t, a_t, g_t, noise_t, fin_t, trial = evaluate(trial, xa, swqa, swa, ta, ~polish)
        gt_s = np.where(free, g_t, 0.0) / ds
        shrinks = _dot_k(gt_s, gt_s) < _dot_k(gf_s, gf_s)
        better = fin_t & ok & ((sse_t < sse) | (polish & (sse_t <= sse + noise) & shrinks))
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            # (rows not taken may have any rho; their branch is discarded)
            rho = np.where(pred > 0, (sse - sse_t) / pred, 0.0)
            lam = np.where(better, lam * np.maximum(LAMBDA_MIN_SHRINK, 1.0 - (2.0 * np.minimum(rho, 1.0) - 1.0) ** 3),
                           lam * nu)
        nu = np.where(better, 2.0, nu * 2.0)
        theta = np.where(better, trial, theta)
        sse = np.where(better, sse_t, sse)
        a_mat = np.where(better, a_t, a_mat)
        g = np.where(better, g_t, g)
        noise = np.where(better, noise_t, noise)
        it += 1

        # no representable step lowers the SSE any more
        stuck = ~better & (lam > MAX_DAMPING)
        if stuck.any():
            near = gn_ok & (pred_gn <= LOOSE_REL_TOL * sse + exact)
            st[stuck & near] = _CONVERGED
            st[stuck & ~near & ~gn_ok] = _SINGULAR
            st[stuck & ~near & gn_ok] = _STALLED

    return tr.to_params(theta_out), sse_out, status_out, iter_out, drift_out


def _merged_seeds(rid, src, group, pos, st, near, theta, sse, a_mat, pred_gn,
                  theta_out, sse_out, status_out):
    """Working-set rows whose seed is heading to the minimum that a sibling
    seed (same isotherm) reaches with a lower SSE; (R,) mask.

    In the quadratic regime SSE(theta) ~ SSE* + |theta - theta*|_A^2 with A the
    normal matrix, and the Gauss-Newton predicted reduction is |theta -
    theta*|_A^2 itself. Two rows near the same minimum are therefore at most
    sqrt(pred_1) + sqrt(pred_2) apart in the A-norm (triangle inequality);
    rows near different minima are much farther apart. A row (``near``: in
    that regime) is merged when a sibling that is also ``near``, or already
    converged (pred 0), lies within twice that distance and has the lower
    SSE (ties: the earlier seed). Only the loser stops; the survivor's own
    iterations are untouched, so the fit reported is the one it would have
    been, minus the work of polishing the same minimum twice.
    """
    k = theta.shape[0]
    cand = np.flatnonzero(near)
    kill = np.zeros(rid.size, dtype=bool)
    n_rows = src.size
    # every (candidate, sibling offset) pair at once
    offsets = np.array([d for d in range(1 - group, group) if d != 0], dtype=np.int64)
    c_p = np.tile(cand, offsets.size)
    r = rid[c_p]
    s_p = r + np.repeat(offsets, cand.size)
    valid = (s_p >= 0) & (s_p < n_rows)
    valid[valid] = src[s_p[valid]] == src[r[valid]]
    c_p, r, s_p = c_p[valid], r[valid], s_p[valid]
    # cheap tests first: is there a usable sibling with the lower SSE at all?
    ps = pos[s_p]
    live = ps >= 0
    ps_c = np.where(live, ps, 0)
    sib_near = live & near[ps_c]
    sib_done = np.where(live, st[ps_c] == _CONVERGED, status_out[s_p] == _CONVERGED)
    sse_s = np.where(live, sse[ps_c], sse_out[s_p])
    sse_r = sse[c_p]
    beaten = (sse_s < sse_r) | ((sse_s == sse_r) & (s_p < r))
    keep = (sib_near | sib_done) & beaten
    if not keep.any():
        return kill
    s_p, c_p, ps_c, live, sib_near = s_p[keep], c_p[keep], ps_c[keep], live[keep], sib_near[keep]
    th_s = np.where(live, theta[:, ps_c], theta_out[s_p].T)
    pred_s = np.where(sib_near, pred_gn[ps_c], 0.0)
    delta = theta[:, c_p] - th_s
    a_c = a_mat[:, :, c_p]
    with np.errstate(all="ignore"):
        dist2 = _dot_k(delta, [_dot_k(a_c[i], delta) for i in range(k)])
        reach = 2.0 * (np.sqrt(pred_gn[c_p]) + np.sqrt(pred_s))
    kill[c_p[np.isfinite(dist2) & (dist2 <= reach * reach)]] = True
    return kill


def _decades_to_bound(tr, before, after):
    """Signed progress (k, R) of each parameter towards a bound from ``before``
    to ``after`` (theta, (k, R)), in decades: + towards the upper bound, -
    towards the lower one. Towards a finite bound it is the decades by which
    the distance to that bound shrank; towards an infinite one the decades of
    growth of the parameter (of theta itself for log-scale parameters, whose
    bounds 0 and infinity are -inf and +inf in theta)."""
    lo, hi = tr.lo[:, None], tr.hi[:, None]
    log_p = tr.log[:, None]
    move = after - before
    with np.errstate(all="ignore"):
        grow = np.where(log_p, np.abs(move) / np.log(10.0),
                        np.where(before * after > 0, np.log10(np.abs(after) / np.abs(before)), 0.0))
        up = np.where(np.isfinite(hi), np.log10((hi - before) / (hi - after)), grow)
        down = np.where(np.isfinite(lo), np.log10((before - lo) / (after - lo)), grow)
        out = np.where(move > 0, up, np.where(move < 0, -down, 0.0))
    return np.nan_to_num(out, nan=0.0, posinf=0.0, neginf=0.0)


def _drift_proof(model, tr, theta, th1, th2, sse, x, swq, sw, t, unit, euler, windows_left):
    """Which suspect rows (R,) are drifting, and where to: (k, R) int8, -1 / +1
    for a parameter running to its lower / upper bound.

    ``theta``, ``th1``, ``th2`` (k, R): now, one and two DRIFT_WINDOWs ago.
    Drifting means: some parameter moved >= DRIFT_DECADES towards the same
    bound in both windows, and the SSE is non-increasing at every probe along
    the last window's displacement extrapolated 1, 2, 4, ... windows ahead up
    to twice the windows the row has left (``windows_left``), strictly lower
    at the last. Positive parameters are extrapolated in log coordinates
    (where a capacity-affinity trade-off is a straight line), the others
    linearly; probes are clipped into the bounds. Where the model is
    homogeneous (``euler``: f(lambda^c_j p_j) = lambda f) each probe takes its
    least-squares lambda, so it measures the best curve of its shape -- the
    valley floor, not a point beside it.
    """
    k, n_rows = theta.shape
    d_now = _decades_to_bound(tr, th1, theta)
    d_before = _decades_to_bound(tr, th2, th1)
    runs = (np.abs(d_now) >= DRIFT_DECADES) & (np.abs(d_before) >= DRIFT_DECADES) \
        & (np.sign(d_now) == np.sign(d_before))
    direction = np.where(runs, np.sign(d_now), 0).astype(np.int8)
    drifting = runs.any(axis=0)
    if not drifting.any():
        return drifting, direction
    lo, hi = tr.lo[:, None], tr.hi[:, None]
    # positive linear parameters (capacities) extrapolate geometrically
    geo = ~tr.log[:, None] & (lo >= 0) & (theta > 0) & (th1 > 0) & (th2 > 0)
    with np.errstate(all="ignore"):
        to_u = lambda v: np.where(geo, np.log(np.where(geo, v, 1.0)), v)  # noqa: E731
        u = to_u(theta)
        step, step_before = u - to_u(th1), to_u(th1) - to_u(th2)
        # the running parameters keep their pace; the others settle as they
        # have been settling (geometric pace ratio, 0 if they turned round)
        ratio = np.where(runs, 1.0, np.clip(np.nan_to_num(step / step_before), 0.0, 0.9))
    # probes at 1, 2, 4, ... windows ahead; a row's last one is the largest <= need
    need = 2.0 * np.maximum(windows_left, 1.0)
    n_probes = np.floor(np.log2(need)).astype(np.int64) + 1
    paths, path, pace = [], step.copy(), step.copy()
    for i in range(int(n_probes.max())):
        paths.append(path.copy())
        for _ in range(2 ** i):  # windows from probe i to probe i + 1
            pace = pace * ratio
            path = path + pace
    paths = np.stack(paths)  # (probes, k, R)

    def probe_sse(idx, where):
        """SSE at theta u + ``where`` (k, len(idx)) for rows ``idx``, scale optimised."""
        with np.errstate(all="ignore"):
            probe = u[:, idx] + where
            probe = np.clip(np.where(geo[:, idx], np.exp(probe), probe), lo, hi)
            p = _params_batch_last(tr, probe)
            f = np.broadcast_to(model.evaluate(x[idx], t[idx], *[p[j][:, None] for j in range(k)]),
                                (idx.size, x.shape[1]))
            sf, sq = (f if unit else sw[idx] * f), swq[idx]
            if euler is not None:
                # f(lambda^c_j p_j) = lambda f(p): the best lambda needs no new evaluation
                scale = np.einsum("ij,ij->i", sf, sq) / np.einsum("ij,ij->i", sf, sf)
                lam_c = np.stack([np.where(scale > 0, scale, 1.0) ** c for c in euler])
                scaled = np.where(tr.log[:, None], probe + np.log(lam_c), probe * lam_c)
                admissible = np.isfinite(scale) & (scale > 0) & np.all((scaled >= lo) & (scaled <= hi), axis=0)
                sf = sf * np.where(admissible, scale, 1.0)[:, None]
            r = sf - sq
            return np.einsum("ij,ij->i", r, r)

    # the farthest probe first: it rejects most suspects with one evaluation
    idx = np.flatnonzero(drifting)
    far = np.full(n_rows, np.inf)
    far[idx] = probe_sse(idx, paths[n_probes[idx] - 1, :, idx].T)
    drifting &= np.isfinite(far) & (far < sse)
    prev = sse.copy()
    for i in range(int(n_probes.max()) - 1):  # then the ones on the way, in order
        idx = np.flatnonzero(drifting & (n_probes > i + 1))
        if idx.size == 0:
            break
        sse_i = probe_sse(idx, paths[i][:, idx])
        drifting[idx] = np.isfinite(sse_i) & (sse_i <= prev[idx])
        prev[idx] = sse_i
    drifting &= far <= prev
    return drifting, np.where(drifting, direction, 0).astype(np.int8)


def _params_batch_last(tr, theta):
    """Model parameters (k, R) from fitted coordinates theta (k, R)."""
    with np.errstate(over="ignore"):
        return np.where(tr.log[:, None], np.exp(theta), theta)


def _dot_k(a, b):
    """sum_i a[i] * b[i] over the short parameter axis, per row (R,).

    Added in a fixed order, element by element: a reduction over the first
    axis of a (k, R) array may be ordered differently depending on R, and a
    row's result must not depend on how many rows it is solved with.
    """
    acc = a[0] * b[0]
    for i in range(1, len(a)):
        acc = acc + a[i] * b[i]
    return acc


def _scaled_restricted(a_mat, free, d):
    """Lower triangle (list of lists of (R,) vectors) of D^-1 A_f D^-1, where
    A_f is ``a_mat`` with frozen parameters decoupled (identity rows/cols)."""
    k = a_mat.shape[0]
    out = [[None] * k for _ in range(k)]
    for i in range(k):
        for j in range(i + 1):
            if i == j:
                out[i][i] = np.where(free[i], a_mat[i, i], 1.0) / (d[i] * d[i])
            else:
                out[i][j] = np.where(free[i] & free[j], a_mat[i, j], 0.0) / (d[i] * d[j])
    return out


def _gauss_newton(a_mat, g, free):
    """Undamped step of the Jacobi-scaled, restricted normal equations.

    Returns (scaled step (k, R), ok (R,), predicted SSE reduction (R,)).
    """
    diag = np.diagonal(a_mat, axis1=0, axis2=1).T
    dscale = np.sqrt(np.maximum(np.where(free, diag, 1.0), 1e-300))
    gf_s = np.where(free, g, 0.0) / dscale
    step, ok = _cholesky_vectors(_scaled_restricted(a_mat, free, dscale), -gf_s)
    return step, ok, -_dot_k(gf_s, step)


def _cholesky_vectors(low_in, b):
    """Solve m x = b for many small symmetric positive definite systems.

    ``low_in`` is the lower triangle as a list of lists of (R,) vectors, b is
    (k, R). Returns (x (k, R), ok (R,)); ok is False where a pivot falls below
    PIVOT_RTOL of its diagonal (numerically singular), and x is 0 there.
    Written out entry by entry: for k <= 4 this is a few dozen vector
    operations, far cheaper than a LAPACK call per tiny matrix.
    """
    k = b.shape[0]
    low = [[None] * k for _ in range(k)]
    ok = np.ones(b.shape[1], dtype=bool)
    with np.errstate(all="ignore"):
        for j in range(k):
            piv = low_in[j][j]
            for m in range(j):
                piv = piv - low[j][m] * low[j][m]
            good = np.isfinite(piv) & (piv > PIVOT_RTOL * np.abs(low_in[j][j])) & (piv > 0)
            ok &= good
            low[j][j] = np.sqrt(np.where(good, piv, 1.0))
            for i in range(j + 1, k):
                dot = low_in[i][j]
                for m in range(j):
                    dot = dot - low[i][m] * low[j][m]
                low[i][j] = dot / low[j][j]
        y = [None] * k
        for i in range(k):
            acc = b[i]
            for m in range(i):
                acc = acc - low[i][m] * y[m]
            y[i] = acc / low[i][i]
        sol = np.empty_like(b)
        for i in reversed(range(k)):
            acc = y[i]
            for m in range(i + 1, k):
                acc = acc - low[m][i] * sol[m]
            sol[i] = acc / low[i][i]
    return np.where(ok & np.isfinite(sol), sol, 0.0), ok


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


def _fill_statistics(out, model, rows, params, status, x, q, w, mask, t, drift=None,
                     calibrated=None):
    """Write SSE, covariance, intervals and criteria for ``rows`` into ``out``.

    ``drift`` (n, k): -1 / +1 where a drifting row's parameter runs to its
    lower / upper bound (see _drift_proof). ``calibrated`` (n,) bool: the
    row's weights are absolute 1/sigma^2 (covariance not rescaled)."""
    # imported here: the metrics package loads the catalogue-wide metric modules
    from .metrics.common import positive_interval_95

    calibrated = np.zeros(params.shape[0], dtype=bool) if calibrated is None else calibrated
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
        variance_factor = np.where(calibrated, 1.0, sse / dof)
        cov = inv_s / (scale[:, :, None] * scale[:, None, :]) * variance_factor[:, None, None]
        stderr = np.sqrt(np.diagonal(cov, axis1=1, axis2=2))
        # a known variance makes the pivot normal: Student t with infinite dof
        quantile_dof = np.where(calibrated, np.inf, dof)
        half = stdtrit(quantile_dof, 0.975)[:, None] * stderr
        ci_low, ci_high = params - half, params + half
        positive = np.array([p.positive for p in model.params])
        log_low, log_high = positive_interval_95(params, stderr, quantile_dof[:, None])
        # a positive parameter on its bound 0 has no log interval: plain Wald, clipped at 0
        inside = positive & (params > 0)
        ci_low = np.where(inside, log_low, np.where(positive, np.maximum(ci_low, 0.0), ci_low))
        ci_high = np.where(inside, log_high, ci_high)
        chi_square = np.where(calibrated, sse, np.nan)
        chi_square_dof = np.where(calibrated, dof, np.nan)
        chi_square_p = np.where(calibrated, chdtrc(dof, sse), np.nan)

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
    out.ci95_low[rows] = np.where(ok[:, None], ci_low, np.nan)
    out.ci95_high[rows] = np.where(ok[:, None], ci_high, np.nan)
    out.chi_square[rows] = chi_square
    out.chi_square_dof[rows] = chi_square_dof
    out.chi_square_p_value[rows] = chi_square_p
    reason = _STATUS_REASON[status]
    if drift is not None:
        drifting = status == _DRIFTING
        at_bound = at_bound | (drifting[:, None] & (drift != 0))
        reason = reason.copy()
        reason[drifting] = _drift_reasons(model, drift[drifting])
    out.at_bound[rows] = at_bound
    out.converged[rows] = status == _CONVERGED
    out.reason[rows] = reason


def _drift_reasons(model, drift):
    """'parameter drifting to bound: q_sat -> inf, affinity -> 0' per row of drift (n, k)."""
    out = np.empty(drift.shape[0], dtype=object)
    codes, inverse = np.unique(drift, axis=0, return_inverse=True)
    for c, code in enumerate(codes):
        parts = [f"{p.name} -> {_bound_text(p.upper if d > 0 else p.lower)}"
                 for p, d in zip(model.params, code) if d != 0]
        out[np.asarray(inverse).ravel() == c] = f"{_STATUS_REASON[_DRIFTING]}: {', '.join(parts)}"
    return out


def _bound_text(value: float) -> str:
    return "inf" if value == np.inf else "-inf" if value == -np.inf else f"{value:g}"
