"""Small dense linear algebra written over the batch axis.

The k x k normal equations (k <= 4 for the catalogue) of every row are solved
at once, entry by entry: a few dozen vector operations per call, far cheaper
than a LAPACK call per tiny matrix, and every row's result independent of how
many rows it is solved with.
"""
from __future__ import annotations

import numpy as np

from ..arrays import BoolArray, FloatArray

# the lower triangle of R small k x k matrices, entry [i][j] (j <= i) an (R,) vector
Triangle = list[list[FloatArray]]

PIVOT_RTOL = 1e-13      # Cholesky pivot / original diagonal below this = singular


def dot_k(a: FloatArray | list[FloatArray], b: FloatArray | list[FloatArray]) -> FloatArray:
    """sum_i a[i] * b[i] over the short parameter axis, per row (R,).

    Added in a fixed order, element by element: a reduction over the first
    axis of a (k, R) array may be ordered differently depending on R, and a
    row's result must not depend on how many rows it is solved with.
    """
    acc = a[0] * b[0]
    for i in range(1, len(a)):
        acc = acc + a[i] * b[i]
    return acc


def scaled_restricted(a_mat: FloatArray, free: BoolArray, d: FloatArray) -> Triangle:
    """Lower triangle (list of lists of (R,) vectors) of D^-1 A_f D^-1, where
    A_f is ``a_mat`` with frozen parameters decoupled (identity rows/cols)."""
    k = a_mat.shape[0]
    out: Triangle = [[np.empty(0)] * k for _ in range(k)]  # every entry below is set
    for i in range(k):
        for j in range(i + 1):
            if i == j:
                out[i][i] = np.where(free[i], a_mat[i, i], 1.0) / (d[i] * d[i])
            else:
                out[i][j] = np.where(free[i] & free[j], a_mat[i, j], 0.0) / (d[i] * d[j])
    return out


def gauss_newton(a_mat: FloatArray, g: FloatArray, free: BoolArray
                 ) -> tuple[FloatArray, BoolArray, FloatArray]:
    """Undamped step of the Jacobi-scaled, restricted normal equations.

    Returns (scaled step (k, R), ok (R,), predicted SSE reduction (R,)).
    """
    diag = np.diagonal(a_mat, axis1=0, axis2=1).T
    dscale = np.sqrt(np.maximum(np.where(free, diag, 1.0), 1e-300))
    gf_s = np.where(free, g, 0.0) / dscale
    step, ok = cholesky_vectors(scaled_restricted(a_mat, free, dscale), -gf_s)
    return step, ok, -dot_k(gf_s, step)


def cholesky_vectors(low_in: Triangle, b: FloatArray) -> tuple[FloatArray, BoolArray]:
    """Solve m x = b for many small symmetric positive definite systems.

    ``low_in`` is the lower triangle as a list of lists of (R,) vectors, b is
    (k, R). Returns (x (k, R), ok (R,)); ok is False where a pivot falls below
    PIVOT_RTOL of its diagonal (numerically singular), and x is 0 there.
    Written out entry by entry: for k <= 4 this is a few dozen vector
    operations, far cheaper than a LAPACK call per tiny matrix.
    """
    k = b.shape[0]
    low: Triangle = [[np.empty(0)] * k for _ in range(k)]  # filled row by row below
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
        y: list[FloatArray] = [np.empty(0)] * k
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


def cholesky_solve(a_mat: FloatArray, b: FloatArray) -> tuple[FloatArray, BoolArray]:
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

