"""Stopping rows early without changing a fit: seed merging and drift proofs.

Seeds: every isotherm is started from a few seeds (isotherm-major order, so
an isotherm's seeds enter the working set together and iterate in lockstep).
Most end in the same minimum; a seed that provably heads for the minimum a
sibling reaches with a lower SSE stops there (merged_seeds), which leaves
the reported fit as it was and saves the duplicated polishing.

Drift: a row whose parameters run off towards a bound (a capacity to
infinity, an affinity to zero, an exponent to its limit) while the SSE
creeps towards that of a limiting model would use every iteration and still
not converge. Every ``SolverOptions.drift_window`` iterations a row is a
suspect when some parameter moved at least ``SolverOptions.drift_decades``
decades towards the same bound in each of the last two windows (decades of
the parameter itself for a bound at 0 or infinity, of its distance to a
finite bound otherwise) and it is not in the quadratic regime. A suspect is
stopped only if the proof holds: the SSE keeps falling along the drift
extrapolated 1, 2, 4, ... windows ahead (in log coordinates for positive
parameters), at least as far as the remaining iterations could carry it at
its present pace -- no minimum the solver could still reach lies on the way.
Otherwise it simply iterates on. The row stops as not converged, its
drifting parameters marked at_bound (the bound they run to is the fit's
limit) and named in its reason.
"""
from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from ..arrays import BoolArray, FloatArray, IntArray
from ..models import IsothermModel
from .evaluate import Transform, params_batch_last
from .linalg import dot_k
from .status import CONVERGED


def merged_seeds(rid: IntArray, src: IntArray, group: int, pos: IntArray, st: IntArray,
                 near: BoolArray, theta: FloatArray, sse: FloatArray, a_mat: FloatArray,
                 pred_gn: FloatArray, theta_out: FloatArray, sse_out: FloatArray,
                 status_out: IntArray) -> BoolArray:
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
    sib_done = np.where(live, st[ps_c] == CONVERGED, status_out[s_p] == CONVERGED)
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
        dist2 = dot_k(delta, [dot_k(a_c[i], delta) for i in range(k)])
        reach = 2.0 * (np.sqrt(pred_gn[c_p]) + np.sqrt(pred_s))
    kill[c_p[np.isfinite(dist2) & (dist2 <= reach * reach)]] = True
    return kill


def decades_to_bound(tr: Transform, before: FloatArray, after: FloatArray) -> FloatArray:
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


def drift_proof(model: type[IsothermModel], tr: Transform, theta: FloatArray, th1: FloatArray,
                th2: FloatArray, sse: FloatArray, x: FloatArray, swq: FloatArray, sw: FloatArray,
                t: FloatArray, unit: bool, euler: tuple[int, ...] | None,
                windows_left: FloatArray, drift_decades: float
                ) -> tuple[BoolArray, NDArray[np.int8]]:
    """Which suspect rows (R,) are drifting, and where to: (k, R) int8, -1 / +1
    for a parameter running to its lower / upper bound.

    ``theta``, ``th1``, ``th2`` (k, R): now, one and two drift windows ago.
    Drifting means: some parameter moved >= ``drift_decades`` towards the same
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
    d_now = decades_to_bound(tr, th1, theta)
    d_before = decades_to_bound(tr, th2, th1)
    runs = (np.abs(d_now) >= drift_decades) & (np.abs(d_before) >= drift_decades) \
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
    path_list, path, pace = [], step.copy(), step.copy()
    for i in range(int(n_probes.max())):
        path_list.append(path.copy())
        for _ in range(2 ** i):  # windows from probe i to probe i + 1
            pace = pace * ratio
            path = path + pace
    paths = np.stack(path_list)  # (probes, k, R)

    def probe_sse(idx: IntArray, where: FloatArray) -> FloatArray:
        """SSE at theta u + ``where`` (k, len(idx)) for rows ``idx``, scale optimised."""
        with np.errstate(all="ignore"):
            probe = u[:, idx] + where
            probe = np.clip(np.where(geo[:, idx], np.exp(probe), probe), lo, hi)
            p = params_batch_last(tr, probe)
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

