"""The projected Levenberg-Marquardt loop over a stream of (isotherm, seed) rows.

Rows are independent; they stream through a working set (``WorkingSet``) of
at most ``SolverOptions.row_block`` rows: a row leaves it as soon as it has
converged, stalled, drifted, merged or used its iterations, and fresh rows
from the queue top it up again, so the arrays stay compact and cache-sized.
"""
from __future__ import annotations

from dataclasses import dataclass, field, fields
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..arrays import BoolArray, FloatArray, IntArray
from ..models import IsothermModel
from .evaluate import Evaluator, Transform, euler_coefficients
from .linalg import cholesky_vectors, dot_k, gauss_newton, scaled_restricted
from .options import SolverOptions
from .seeds import drift_proof, merged_seeds
from .status import CONVERGED, DRIFTING, MAX_ITER, MERGED, NONFINITE, RUNNING, SINGULAR, STALLED

_EULER_PROBE_ROWS = 256


def fit_rows(model: type[IsothermModel], x: FloatArray, q: FloatArray, w: FloatArray,
             mask: BoolArray, t: FloatArray, options: SolverOptions
             ) -> tuple[FloatArray, IntArray, IntArray, NDArray[np.int8]]:
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
    params, sse, status, iters, drift = levenberg_marquardt(model, seeds, x, q, w, mask, t, src, options)

    # per isotherm: lowest SSE among converged seeds, else lowest SSE overall
    # (ties: the earlier seed, as the seed rule ranked them); a drifting seed
    # counts as not converged, as it would have at the iteration cap
    fallback = np.where(np.isfinite(sse), sse, np.inf).reshape(n, n_seeds)
    rank = np.where(status.reshape(n, n_seeds) == CONVERGED, fallback, np.inf)
    any_conv = np.isfinite(rank).any(axis=1)
    pick = np.where(any_conv, np.argmin(rank, axis=1), np.argmin(fallback, axis=1))
    flat = np.arange(n) * n_seeds + pick
    return params[flat], status[flat], iters[flat], drift[flat]


def _batch_last() -> Any:  # dataclasses.field() is Any to a type checker
    return field(metadata={"row_axis": -1})


def _row_major() -> Any:
    return field(metadata={"row_axis": 0})


@dataclass
class WorkingSet:
    """The state of the R rows being iterated, one array per quantity.

    Solver state is batch-last -- (k, R) or (k, k, R) -- so each entry is one
    contiguous vector; the rows' data are row-major (R, points). ``take`` and
    ``extend`` are the only places rows leave or join, every field at once.
    """

    rid: np.ndarray = _batch_last()      # (R,) the row's index in the queue
    theta: np.ndarray = _batch_last()    # (k, R) fitted coordinates (see Transform)
    sse: np.ndarray = _batch_last()      # (R,) weighted sum of squares at theta
    a_mat: np.ndarray = _batch_last()    # (k, k, R) normal matrix J^T W J at theta
    g: np.ndarray = _batch_last()        # (k, R) gradient J^T W r at theta
    noise: np.ndarray = _batch_last()    # (R,) rounding noise of sse
    lam: np.ndarray = _batch_last()      # (R,) damping
    nu: np.ndarray = _batch_last()       # (R,) damping growth after a rejected step
    dmax: np.ndarray = _batch_last()     # (k, R) largest normal-matrix diagonal seen (Marquardt scaling)
    it: np.ndarray = _batch_last()       # (R,) iterations used
    st: np.ndarray = _batch_last()       # (R,) status code (status.py)
    exact: np.ndarray = _batch_last()    # (R,) SSE at or below which the data are fitted exactly
    th1: np.ndarray = _batch_last()      # (k, R) theta one drift window ago
    th2: np.ndarray = _batch_last()      # (k, R) theta two drift windows ago
    free: np.ndarray = _batch_last()     # (k, R) parameter not held on a bound this iteration
    gn_ok: np.ndarray = _batch_last()    # (R,) the Gauss-Newton system is solvable
    pred_gn: np.ndarray = _batch_last()  # (R,) Gauss-Newton predicted SSE reduction
    x: np.ndarray = _row_major()         # (R, m) pressures (or p/p0)
    swq: np.ndarray = _row_major()       # (R, m) sqrt(w) q
    sw: np.ndarray = _row_major()        # (R, m) sqrt(w)
    t: np.ndarray = _row_major()         # (R, 1) temperature

    @classmethod
    def empty(cls, k: int, point_shape: tuple[int, ...]) -> WorkingSet:
        data = np.zeros((0,) + point_shape)
        return cls(rid=np.zeros(0, dtype=np.int64), theta=np.zeros((k, 0)), sse=np.zeros(0),
                   a_mat=np.zeros((k, k, 0)), g=np.zeros((k, 0)), noise=np.zeros(0), lam=np.zeros(0),
                   nu=np.zeros(0), dmax=np.zeros((k, 0)), it=np.zeros(0, dtype=np.int64),
                   st=np.zeros(0, dtype=np.int64), exact=np.zeros(0), th1=np.zeros((k, 0)),
                   th2=np.zeros((k, 0)), free=np.zeros((k, 0), dtype=bool), gn_ok=np.zeros(0, dtype=bool),
                   pred_gn=np.zeros(0), x=data, swq=data.copy(), sw=data.copy(), t=np.zeros((0, 1)))

    @property
    def size(self) -> int:
        return self.rid.size

    def take(self, keep: BoolArray) -> WorkingSet:
        """The rows where ``keep`` (R,) bool is True, every field at once."""
        return WorkingSet(**{f.name: np.compress(keep, getattr(self, f.name), axis=f.metadata["row_axis"])
                             for f in fields(self)})

    def extend(self, other: WorkingSet) -> WorkingSet:
        """These rows followed by ``other``'s."""
        return WorkingSet(**{f.name: np.concatenate([getattr(self, f.name), getattr(other, f.name)],
                                                    axis=f.metadata["row_axis"])
                             for f in fields(self)})


def _free(theta: FloatArray, g: FloatArray, lo: FloatArray, hi: FloatArray) -> BoolArray:
    """(k, R): parameters not held on a bound (a projected Newton active set:
    one sitting on a bound whose gradient pushes outward is frozen)."""
    return ~(((theta <= lo) & (g > 0)) | ((theta >= hi) & (g < 0)))


def levenberg_marquardt(model: type[IsothermModel], theta0_params: FloatArray, x: FloatArray,
                        q: FloatArray, w: FloatArray, mask: BoolArray, t: FloatArray, src: IntArray,
                        options: SolverOptions
                        ) -> tuple[FloatArray, FloatArray, IntArray, IntArray, NDArray[np.int8]]:
    """Run LM on rows ``src`` (indices into x, q, ...) from the given params.

    Returns params (N, k), sse (N,), status (N,), iterations (N,) and drift
    (N, k) for the N = len(src) rows.
    """
    o = options
    block, max_iter = int(o.row_block), o.max_iter
    tr = Transform(model)
    n_rows, k = theta0_params.shape
    theta0 = np.clip(tr.to_theta(theta0_params), tr.lo, tr.hi)
    theta_out = theta0.copy()
    sse_out = np.full(n_rows, np.inf)
    status_out = np.full(n_rows, RUNNING)
    iter_out = np.zeros(n_rows, dtype=np.int64)
    drift_out = np.zeros((n_rows, k), dtype=np.int8)
    exact_all = o.exact_rel_tol * np.einsum("ij,ij->i", w * q, q)
    sw_all = np.sqrt(w)  # w is 0 at padding
    unit = bool(np.all(w == 1.0))  # no padding, uniform weights: skip sqrt(w) products
    swq_all = q if unit else sw_all * q  # weighted loadings, formed once per row
    lo, hi = tr.lo[:, None], tr.hi[:, None]

    probe = np.arange(min(n_rows, _EULER_PROBE_ROWS))
    euler = euler_coefficients(model, tr, theta0[probe].T.copy(), x[src[probe]], t[src[probe]]) \
        if n_rows else None
    evaluate = Evaluator(model, tr, unit, euler, o.project_scale)

    ws = WorkingSet.empty(k, x.shape[1:])
    queued = 0
    # seeds of one isotherm are neighbours in src (isotherm-major order)
    group = int(np.bincount(src).max()) if n_rows and np.all(np.diff(src) >= 0) else 1
    pos = np.full(n_rows, -1, dtype=np.int64)  # row -> its place in the working set, -1 if out

    while True:
        # -- rows leave: stalled last time, out of iterations, or converged --
        running = ws.st == RUNNING
        out = running & (ws.it >= max_iter)
        if out.any():
            _, ok_gn, _ = gauss_newton(ws.a_mat[:, :, out], ws.g[:, out],
                                       _free(ws.theta[:, out], ws.g[:, out], lo, hi))
            ws.st[out] = np.where(ok_gn, MAX_ITER, SINGULAR)
        check = running & ~out
        ws.free = _free(ws.theta, ws.g, lo, hi)
        ws.gn_ok, ws.pred_gn = np.zeros(ws.size, bool), np.zeros(ws.size)
        if check.any():
            _, ws.gn_ok, ws.pred_gn = gauss_newton(ws.a_mat, ws.g, ws.free)
            done = check & ((ws.gn_ok & (ws.pred_gn <= o.gn_rel_tol * ws.sse + ws.exact)) | (ws.sse <= ws.exact))
            ws.st[done] = CONVERGED
            if o.merge_seeds and group > 1:
                near = (ws.st == RUNNING) & ws.gn_ok & (ws.pred_gn <= o.merge_rel_tol * ws.sse)
                if near.any():
                    pos[ws.rid] = np.arange(ws.size)
                    ws.st[merged_seeds(ws.rid, src, group, pos, ws.st, near, ws.theta, ws.sse, ws.a_mat,
                                       ws.pred_gn, theta_out, sse_out, status_out)] = MERGED
        # -- drift: every drift_window iterations --
        at_mark = (ws.it % o.drift_window == 0) & (ws.st == RUNNING)
        if at_mark.any():
            suspect = at_mark & (ws.it >= 2 * o.drift_window) \
                & ~(ws.gn_ok & (ws.pred_gn <= o.polish_rel_tol * ws.sse))
            if suspect.any():
                idx = np.flatnonzero(suspect)
                drifting, direction = drift_proof(
                    model, tr, ws.theta[:, idx], ws.th1[:, idx], ws.th2[:, idx], ws.sse[idx],
                    ws.x[idx], ws.swq[idx], ws.sw[idx], ws.t[idx], evaluate.unit, evaluate.euler,
                    (max_iter - ws.it[idx]) / o.drift_window, o.drift_decades)
                hit = idx[drifting]
                ws.st[hit] = DRIFTING
                drift_out[ws.rid[hit]] = direction[:, drifting].T
            ws.th2[:, at_mark] = ws.th1[:, at_mark]
            ws.th1[:, at_mark] = ws.theta[:, at_mark]
        keep = ws.st == RUNNING
        if not keep.all():
            gone = ~keep
            rows = ws.rid[gone]
            pos[rows] = -1
            theta_out[rows] = ws.theta[:, gone].T
            sse_out[rows] = ws.sse[gone]
            status_out[rows] = ws.st[gone]
            iter_out[rows] = ws.it[gone]
            ws = ws.take(keep)

        # -- fresh rows from the queue top the working set up --
        if queued < n_rows and ws.size <= block - block // 4:
            end = min(n_rows, queued + block - ws.size)
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
            status_out[new[~fin]] = NONFINITE
            m = new.size
            fresh = WorkingSet(
                rid=new, theta=th_n, sse=sse_n, a_mat=a_n, g=g_n, noise=noise_n,
                lam=np.full(m, o.lambda_init), nu=np.full(m, 2.0),
                dmax=np.abs(np.diagonal(a_n, axis1=0, axis2=1).T), it=np.zeros(m, dtype=np.int64),
                st=np.full(m, RUNNING), exact=exact_all[s], th1=th_n, th2=th_n,
                free=np.ones((k, m), dtype=bool), gn_ok=np.zeros(m, dtype=bool), pred_gn=np.zeros(m),
                x=x_n, swq=swq_n, sw=sw_n, t=t_n)
            if not fin.all():
                fresh = fresh.take(fin)
            if fresh.size:
                fresh.free = _free(fresh.theta, fresh.g, lo, hi)
                _, fresh.gn_ok, fresh.pred_gn = gauss_newton(fresh.a_mat, fresh.g, fresh.free)
                if max_iter <= 0:
                    fresh.st[:] = np.where(fresh.gn_ok, MAX_ITER, SINGULAR)
                else:
                    done = (fresh.gn_ok & (fresh.pred_gn <= o.gn_rel_tol * fresh.sse + fresh.exact)) \
                        | (fresh.sse <= fresh.exact)
                    fresh.st[done] = CONVERGED
                started = fresh.st == RUNNING
                if not started.all():
                    gone = ~started
                    theta_out[fresh.rid[gone]] = fresh.theta[:, gone].T
                    status_out[fresh.rid[gone]] = fresh.st[gone]
                ws = ws.extend(fresh.take(started))
        if ws.size == 0:
            if queued >= n_rows:
                break
            continue

        # -- damped, Jacobi-scaled step --
        # Close to the minimum SSE differences drown in rounding; there a step
        # that shrinks the (scaled) gradient without raising the SSE beyond its
        # rounding noise is progress too. Before that (the approach), the
        # trial point takes its best scale (see Evaluator._best_scale).
        polish = ws.gn_ok & (ws.pred_gn <= o.polish_rel_tol * ws.sse)
        free, theta, sse, a_mat, g = ws.free, ws.theta, ws.sse, ws.a_mat, ws.g
        diag = np.diagonal(a_mat, axis1=0, axis2=1).T          # (k, R)
        diag_f = np.where(free, diag, 1.0)
        ws.dmax = np.maximum(ws.dmax, diag_f)
        ds = np.sqrt(np.where(ws.dmax > 0, ws.dmax, 1.0))
        gf_s = np.where(free, g, 0.0) / ds
        mat = scaled_restricted(a_mat, free, ds)
        for j in range(k):
            mat[j][j] = mat[j][j] + ws.lam
        step_s, ok = cholesky_vectors(mat, -gf_s)
        step = np.where(free, step_s / ds, 0.0)
        trial = np.clip(theta + step, lo, hi)
        step = trial - theta
        quad = dot_k(step, [dot_k(a_mat[i], step) for i in range(k)])
        pred = -(2.0 * dot_k(step, g) + quad)

        sse_t, a_t, g_t, noise_t, fin_t, trial = evaluate(trial, ws.x, ws.swq, ws.sw, ws.t, ~polish)
        gt_s = np.where(free, g_t, 0.0) / ds
        shrinks = dot_k(gt_s, gt_s) < dot_k(gf_s, gf_s)
        better = fin_t & ok & ((sse_t < sse) | (polish & (sse_t <= sse + ws.noise) & shrinks))
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            # (rows not taken may have any rho; their branch is discarded)
            rho = np.where(pred > 0, (sse - sse_t) / pred, 0.0)
            ws.lam = np.where(better, ws.lam * np.maximum(o.lambda_min_shrink,
                                                          1.0 - (2.0 * np.minimum(rho, 1.0) - 1.0) ** 3),
                              ws.lam * ws.nu)
        ws.nu = np.where(better, 2.0, ws.nu * 2.0)
        ws.theta = np.where(better, trial, theta)
        ws.sse = np.where(better, sse_t, sse)
        ws.a_mat = np.where(better, a_t, a_mat)
        ws.g = np.where(better, g_t, g)
        ws.noise = np.where(better, noise_t, ws.noise)
        ws.it += 1

        # no representable step lowers the SSE any more
        stuck = ~better & (ws.lam > o.max_damping)
        if stuck.any():
            near = ws.gn_ok & (ws.pred_gn <= o.loose_rel_tol * ws.sse + ws.exact)
            ws.st[stuck & near] = CONVERGED
            ws.st[stuck & ~near & ~ws.gn_ok] = SINGULAR
            ws.st[stuck & ~near & ws.gn_ok] = STALLED

    return tr.to_params(theta_out), sse_out, status_out, iter_out, drift_out
