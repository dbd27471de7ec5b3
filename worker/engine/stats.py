"""Statistics of the chosen fits: SSE, covariance, intervals, information
criteria, bounds flags and the reason every row reports."""
from __future__ import annotations

import numpy as np
# scipy.special, not scipy.stats: the same quantile functions (stats.t.ppf and
# stats.norm.ppf call them) without the 0.5 s import of scipy.stats at every start
from scipy.special import chdtrc, stdtrit

from numpy.typing import ArrayLike, NDArray

from ..arrays import BoolArray, FloatArray, IntArray, ObjectArray
from ..models import IsothermModel
from ..results import ModelFits
from .linalg import cholesky_solve
from .options import DEFAULT_SOLVER_OPTIONS
from .status import CONVERGED, DRIFTING, NONFINITE, SINGULAR, STATUS_REASON


def canonical_with_flags(model: type[IsothermModel], params: FloatArray, flags: NDArray[np.int8]
                         ) -> tuple[FloatArray, NDArray[np.int8]]:
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


def empty_fits(model: type[IsothermModel], n: int, n_points: ArrayLike, applicable: ArrayLike
               ) -> ModelFits:
    """ModelFits of ``n`` rows not fitted yet: nan statistics, not converged, no reason."""
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


def fill_statistics(out: ModelFits, model: type[IsothermModel], rows: IntArray, params: FloatArray,
                    status: IntArray, x: FloatArray, q: FloatArray, w: FloatArray, mask: BoolArray,
                    t: FloatArray, drift: NDArray[np.int8] | None = None,
                    calibrated: BoolArray | None = None,
                    influence_rtol: float = DEFAULT_SOLVER_OPTIONS.influence_rtol) -> None:
    """Write SSE, covariance, intervals and criteria for ``rows`` into ``out``.

    ``drift`` (n, k): -1 / +1 where a drifting row's parameter runs to its
    lower / upper bound (see seeds.drift_proof). ``calibrated`` (n,) bool: the
    row's weights are absolute 1/sigma^2 (covariance not rescaled).
    ``influence_rtol``: see SolverOptions."""
    # imported here: the metrics package loads the catalogue-wide metric modules
    from ..metrics.common import positive_interval_95

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
            col, ok_j = cholesky_solve(a_s, e)
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
    # ``influence_rtol`` of the data has run off to a limit (flat data drive a
    # Langmuir affinity to infinity; all-zero data any capacity to zero): the
    # SSE may be tiny, yet that parameter is not determined.
    with np.errstate(all="ignore"):
        influence = np.stack([np.sqrt(np.einsum("ij,ij->i", jw[j], jw[j])) * np.abs(params[:, j])
                              for j in range(k)], axis=1)
        data_norm = np.sqrt(np.einsum("ij,ij->i", w * q, q))
    inert = (influence <= influence_rtol * data_norm[:, None]).any(axis=1)
    # a parameter on a bound can make another irrelevant (an empty second
    # site's affinity); that fit did converge -- selection reports the bound
    undetermined = (~ok | inert) & ~at_bound.any(axis=1)
    status = np.where((status == CONVERGED) & undetermined, SINGULAR, status)
    finite = np.isfinite(sse) & np.isfinite(params).all(axis=1)
    status = np.where((status == CONVERGED) & ~finite, NONFINITE, status)

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
    reason = STATUS_REASON[status]
    if drift is not None:
        drifting = status == DRIFTING
        at_bound = at_bound | (drifting[:, None] & (drift != 0))
        reason = reason.copy()
        reason[drifting] = drift_reasons(model, drift[drifting])
    out.at_bound[rows] = at_bound
    out.converged[rows] = status == CONVERGED
    out.reason[rows] = reason


def drift_reasons(model: type[IsothermModel], drift: NDArray[np.int8]) -> ObjectArray:
    """'parameter drifting to bound: q_sat -> inf, affinity -> 0' per row of drift (n, k)."""
    out = np.empty(drift.shape[0], dtype=object)
    codes, inverse = np.unique(drift, axis=0, return_inverse=True)
    for c, code in enumerate(codes):
        parts = [f"{p.name} -> {bound_text(p.upper if d > 0 else p.lower)}"
                 for p, d in zip(model.params, code) if d != 0]
        out[np.asarray(inverse).ravel() == c] = f"{STATUS_REASON[DRIFTING]}: {', '.join(parts)}"
    return out


def bound_text(value: float) -> str:
    """A bound as a reason names it: inf, -inf, or the number."""
    return "inf" if value == np.inf else "-inf" if value == -np.inf else f"{value:g}"
