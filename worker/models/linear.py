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
