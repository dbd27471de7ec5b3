"""The model at many rows at once: fitted coordinates, SSE, normal matrix and
gradient, and the Euler degrees that give the model values from the Jacobian."""
from __future__ import annotations

import numpy as np

from ..arrays import BoolArray, FloatArray
from ..models import IsothermModel


class Transform:
    """Fitted coordinates theta: log(p) for log_scale params, p otherwise."""

    def __init__(self, model: type[IsothermModel]) -> None:
        lo, hi = model.lower_bounds(), model.upper_bounds()
        self.log = np.array([p.log_scale and p.lower >= 0 for p in model.params])
        with np.errstate(divide="ignore"):
            self.lo = np.where(self.log, np.log(np.maximum(lo, 0.0)), lo)
            self.hi = np.where(self.log, np.log(hi), hi)

    def to_theta(self, p: FloatArray) -> FloatArray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.log, np.log(np.maximum(p, 1e-300)), p)

    def to_params(self, theta: FloatArray) -> FloatArray:
        with np.errstate(over="ignore"):
            return np.where(self.log, np.exp(theta), theta)



def params_batch_last(tr: Transform, theta: FloatArray) -> FloatArray:
    """Model parameters (k, R) from fitted coordinates theta (k, R)."""
    with np.errstate(over="ignore"):
        return np.where(tr.log[:, None], np.exp(theta), theta)



class Evaluator:
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
    ``euler_coefficients``); otherwise (None) ``model.evaluate`` is called.
    """

    def __init__(self, model: type[IsothermModel], tr: Transform, unit_weights: bool,
                 euler: tuple[int, ...] | None, project_scale: bool = True) -> None:
        self.model, self.tr, self.unit, self.euler = model, tr, unit_weights, euler
        self.project_scale = project_scale  # SolverOptions.project_scale
        self.k = len(model.params)
        # the Euler degrees as a column, for moving rows to their best scale
        self.degree = None if euler is None else np.asarray(euler, dtype=float)[:, None]

    def __call__(self, theta: FloatArray, x: FloatArray, swq: FloatArray, sw: FloatArray,
                 t: FloatArray, project: BoolArray | None = None
                 ) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray, BoolArray, FloatArray]:
        """At ``theta`` (k, R): sse (R,), a (k, k, R), g (k, R), noise (R,),
        finite (R,) and theta itself (moved where ``project`` asks).

        ``swq``: the weighted loadings sqrt(w) q (q itself for unit weights),
        formed once per row by the caller. ``project`` (R,): rows moved to
        their best scale first (see _best_scale).
        """
        model, tr, k = self.model, self.tr, self.k
        p = params_batch_last(tr, theta)
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
                assert f is not None  # euler_coefficients never returns all-zero degrees
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
            if euler is not None and self.project_scale and (project is None or project.any()):
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

    def _best_scale(self, theta: FloatArray, swf: FloatArray, swq: FloatArray, ff: FloatArray,
                    project: BoolArray | None) -> tuple[FloatArray, FloatArray, FloatArray]:
        """The least-squares scale lambda of the curve per row and the point it
        leads to: theta (k, R) moved to p_j lambda^c_j (f(p) -> lambda f(p),
        Euler), lambda (R,) (1 where no admissible scale exists), and the
        factor (k, R) each Jacobian column (in the solver's coordinates) takes
        there: lambda for log coordinates, lambda^(1 - c_j) for linear ones."""
        tr, c = self.tr, self.degree
        assert c is not None  # called only with Euler degrees (see __call__)
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



def euler_coefficients(model: type[IsothermModel], tr: Transform, theta: FloatArray, x: FloatArray,
                       t: FloatArray) -> tuple[int, ...] | None:
    """Integer c with f = sum_j c_j p_j df/dp_j at the probe rows, or None.

    Found by least squares on the probe and accepted only if the identity
    then holds to 1e-10 relative at every finite probe point.
    """
    k = len(model.params)
    p = params_batch_last(tr, theta)
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
        c: FloatArray = np.linalg.lstsq(basis / scale, target, rcond=None)[0]
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
