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
would lower the SSE by less than ``SolverOptions.gn_rel_tol`` of the SSE (the squared
cosine between residual and Jacobian range). That quantity is computed
directly, not as a difference of two SSEs, so it reaches far below machine
precision of the SSE itself and pins parameters to ~1e-10 relative. A row
whose parameters run off towards a bound while the SSE keeps falling along
the way (a fit tending to a limiting model, which has no minimum at finite
parameters) is stopped early as drifting; see seeds.py.

Best scale: every catalogue model is homogeneous in its capacity-like
parameters (f(lambda^c p) = lambda f(p), Euler), so the least-squares scale of
a curve is known in closed form. While a row approaches its minimum, each
trial point is moved to its best scale before it is judged (a projection in
the spirit of variable projection, Golub & Pereyra 1973): the capacity-
affinity valley that makes plain Levenberg-Marquardt crawl is taken in one
step. Near the minimum (the quadratic regime) rows step plainly, so the
stopping test and the final polish are those of the unprojected problem.

Seeds: every isotherm is started from a few seeds; a seed that provably
heads for a sibling's minimum, and a row provably drifting to a limiting
model, stop early (seeds.py).

Layout: weights.py (point weights, the padded point axis), lm.py (the loop
and its working set), evaluate.py (the model at many rows: SSE, normal
matrix, Euler degrees), seeds.py (merging, drift proofs), linalg.py (batched
Cholesky), stats.py (covariance, intervals, criteria, reasons), options.py
(the tolerances and switches, ``SolverOptions``), status.py (row codes).
"""
from __future__ import annotations

import logging
from collections.abc import Iterable

import numpy as np

from ..interrupts import ends_job
from ..models import CATALOGUE, IsothermModel, default_models
from ..packing import Packed
from ..results import ModelFits
from .lm import fit_rows
from .options import DEFAULT_SOLVER_OPTIONS, SolverOptions
from .stats import canonical_with_flags, empty_fits, fill_statistics
from .weights import WEIGHTINGS, canonical_width, check_weighting, last_real, sigma_mol_per_kg, without_sigma

__all__ = ["WEIGHTINGS", "SolverOptions", "check_weighting", "fit_model", "fit_models", "resolve_models",
           "sigma_mol_per_kg"]

log = logging.getLogger(__name__)

# "all", "langmuir,sips", or model ids and classes
ModelChoice = str | Iterable[str | type[IsothermModel]]


def fit_models(packed: Packed, models: ModelChoice = "all", weighting: str = "uniform",
               absolute_sigma: bool = False, options: SolverOptions | None = None) -> dict[str, ModelFits]:
    """Fit each model to every isotherm of ``packed``; return {model id: ModelFits}.

    ``models`` is "all" (the default set), a comma string or a list of model ids or
    classes (``resolve_models``);
    ``weighting``, ``absolute_sigma`` and ``options`` as in ``fit_model``.
    """
    check_weighting(weighting, absolute_sigma)
    out = {}
    for model in resolve_models(models):
        try:
            out[model.id] = fit_model(model, packed, weighting, absolute_sigma=absolute_sigma,
                                      options=options)
        except Exception as exc:  # one broken model must not sink the others
            if ends_job(exc):
                raise
            log.exception("model %s failed on the whole batch", model.id)
            fits = empty_fits(model, packed.n, packed.n_points, np.ones(packed.n, dtype=bool))
            fits.reason[:] = f"internal error: {type(exc).__name__}: {exc}"
            out[model.id] = fits
    return out


def resolve_models(models: ModelChoice = "all") -> list[type[IsothermModel]]:
    """Model classes named by "all", a comma string, or a list of ids/classes.

    "all" is the default set (``default_models``: opt-in models left out); in
    a list it stands for that set, so "all,jovanovic" adds an opt-in model.
    A model named twice is fitted once.
    """
    if isinstance(models, str):
        models = [s.strip() for s in models.split(",") if s.strip()]
    out = []
    for m in models:
        if isinstance(m, str):
            if m == "all":
                out += [d for d in default_models() if d not in out]
                continue
            if m not in CATALOGUE:
                raise KeyError(f"unknown model {m!r}; known models: {', '.join(sorted(CATALOGUE))}")
            m = CATALOGUE[m]
        if m not in out:
            out.append(m)
    return out


def fit_model(model: type[IsothermModel], packed: Packed, weighting: str = "uniform",
              *, absolute_sigma: bool = False, options: SolverOptions | None = None) -> ModelFits:
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

    ``options``: the solver's tolerances and switches (SolverOptions; its
    defaults when None).
    """
    options = options or DEFAULT_SOLVER_OPTIONS
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
    sigma = sigma_mol_per_kg(packed, weighting)
    calibrated = np.zeros(n, dtype=bool)
    if absolute_sigma and packed.sigma_mol_per_kg is not None:
        calibrated = ~without_sigma(packed)

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

    out = empty_fits(model, n, packed.n_points, applicable)
    rows = np.flatnonzero(reason == "")
    out.reason[:] = reason
    if rows.size == 0:
        return out

    with np.errstate(divide="ignore", invalid="ignore"):  # bad-sigma rows are already out
        weight = np.where(mask, 1.0 / np.where(mask, sigma, 1.0) ** 2, 0.0)
    xs, qs, ws, ms = canonical_width(x[rows], q[rows], weight[rows], mask[rows])
    xs = np.where(ms, xs, last_real(xs, ms))  # padding stays an in-range copy
    ts = packed.temperature_k[rows][:, None]

    params, status, _, drift = fit_rows(model, xs, qs, ws, ms, ts, options)
    params, drift = canonical_with_flags(model, params, drift)
    fill_statistics(out, model, rows, params, status, xs, qs, ws, ms, ts, drift,
                    calibrated=calibrated[rows], influence_rtol=options.influence_rtol)
    return out

