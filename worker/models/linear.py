"""Masked straight-line fits over a batch: seeds for nonlinear models."""
from __future__ import annotations

import numpy as np


def masked_linear_fit(x: np.ndarray, y: np.ndarray, mask: np.ndarray):
    """Least-squares line y = slope * x + intercept for every row at once.

    Returns (slope, intercept, n_used), each shape (n,). Rows with fewer than
    two distinct x give nan slope and intercept.
    """
    w = mask.astype(float)
    n_used = w.sum(axis=1)
    safe_n = np.maximum(n_used, 1.0)
    x0 = np.where(mask, x, 0.0)
    y0 = np.where(mask, y, 0.0)
    mx = x0.sum(axis=1) / safe_n
    my = y0.sum(axis=1) / safe_n
    dx = np.where(mask, x - mx[:, None], 0.0)
    dy = np.where(mask, y - my[:, None], 0.0)
    sxx = (dx * dx).sum(axis=1)
    sxy = (dx * dy).sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = np.where((sxx > 0) & (n_used >= 2), sxy / sxx, np.nan)
    intercept = my - slope * mx
    return slope, intercept, n_used


def masked_quadratic_fit(x: np.ndarray, y: np.ndarray, mask: np.ndarray):
    """Least-squares parabola y = a x^2 + b x + c for every row at once.

    Returns (a, b, c), each shape (n,); nan for rows with fewer than three
    distinct x (the normal equations are then singular).
    """
    w = mask.astype(float)
    x0 = np.where(mask, x, 0.0)
    y0 = np.where(mask, y, 0.0)
    # centre and scale x so the 3x3 normal equations stay well conditioned
    n_used = np.maximum(w.sum(axis=1, keepdims=True), 1.0)
    centre = x0.sum(axis=1, keepdims=True) / n_used
    spread = np.sqrt((w * (x0 - centre) ** 2).sum(axis=1, keepdims=True) / n_used)
    spread = np.where(spread > 0, spread, 1.0)
    u = (x0 - centre) / spread
    basis = np.stack([w * u * u, w * u, w], axis=-1)               # (n, m, 3)
    normal = np.einsum("nmi,nmj->nij", basis, basis)
    rhs = np.einsum("nmi,nm->ni", basis, y0)
    det = np.linalg.det(normal)
    scale = np.einsum("nii->n", normal) ** 3
    ok = np.abs(det) > 1e-12 * np.maximum(scale, 1e-300)
    safe = np.where(ok[:, None, None], normal, np.eye(3))
    au, bu, cu = np.moveaxis(np.linalg.solve(safe, rhs[..., None])[..., 0], -1, 0)
    # back from the centred, scaled variable u = (x - centre) / spread
    s, c0 = spread[:, 0], centre[:, 0]
    a = au / s**2
    b = bu / s - 2.0 * a * c0
    c = cu - bu * c0 / s + au * c0**2 / s**2
    nan = np.full_like(a, np.nan)
    return np.where(ok, a, nan), np.where(ok, b, nan), np.where(ok, c, nan)
