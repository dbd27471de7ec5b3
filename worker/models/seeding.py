"""Batch helpers for the models' initial-guess rules.

Seeds are built as candidates (each (n, k): one parameter row per isotherm),
then every model keeps, per isotherm, the few with the smallest sum of
squared residuals. A linear scale parameter (capacity, Henry constant, ...)
is never guessed: given the other parameters it has a closed-form least-squares
value, so a coarse grid over the nonlinear parameters is enough to land in
the right basin.
"""
from __future__ import annotations

import numpy as np

from .base import masked_max, masked_min

# seeds kept per isotherm: enough for the engine to escape one poor basin,
# few enough that fitting from each stays cheap
SEEDS_KEPT = 3

# stand-in loading (mol/kg) for an isotherm with no positive loading at all,
# so every seed stays finite and strictly positive
_FALLBACK_LOADING = 1e-6


def data_scales(x: np.ndarray, q: np.ndarray, mask: np.ndarray):
    """Return (x_lo, x_hi, q_hi), each (n, 1), positive and finite.

    x_lo / x_hi are the smallest / largest positive real x; q_hi the largest
    real loading. Degenerate rows (no positive x or loading) get stand-ins.
    """
    x_ok = mask & np.isfinite(x) & (x > 0)
    x_lo = masked_min(np.where(x_ok, x, np.inf), x_ok)
    x_hi = masked_max(np.where(x_ok, x, -np.inf), x_ok)
    x_lo = np.where(np.isfinite(x_lo), x_lo, 1.0)
    x_hi = np.where(np.isfinite(x_hi), x_hi, x_lo)
    q_ok = mask & np.isfinite(q)
    q_hi = masked_max(np.where(q_ok, q, -np.inf), q_ok)
    q_hi = np.where(np.isfinite(q_hi) & (q_hi > 0), q_hi, _FALLBACK_LOADING)
    return x_lo, x_hi, q_hi


def log_grid(lo: np.ndarray, hi: np.ndarray, count: int) -> np.ndarray:
    """Return `count` log-spaced values per row between lo and hi: (count, n, 1)."""
    frac = np.linspace(0.0, 1.0, count)[:, None, None]
    return lo[None] * (hi[None] / lo[None]) ** frac


def best_scale(q: np.ndarray, shape: np.ndarray, mask: np.ndarray,
               fallback: np.ndarray) -> np.ndarray:
    """Least-squares scale s minimising sum (q - s * shape)^2 over real points, (n, 1).

    Rows where that scale is not a positive finite number get `fallback`.
    """
    shape = np.broadcast_to(shape, q.shape)
    ok = mask & np.isfinite(shape) & np.isfinite(q)
    g = np.where(ok, shape, 0.0)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        scale = (np.einsum("ij,ij->i", g, np.where(ok, q, 0.0))
                 / np.einsum("ij,ij->i", g, g))[:, None]
    return np.where(np.isfinite(scale) & (scale > 0), scale, fallback)


def finite_positive(value: np.ndarray, fallback: np.ndarray) -> np.ndarray:
    """`value` where it is finite and > 0, else `fallback`."""
    return np.where(np.isfinite(value) & (value > 0), value, fallback)


def row(*columns: np.ndarray) -> np.ndarray:
    """Stack (n, 1) parameter columns into one candidate (n, k)."""
    n = max(np.shape(c)[0] for c in columns if np.ndim(c) > 0)
    return np.concatenate([np.broadcast_to(c, (n, 1)) for c in columns], axis=1)


def keep_best(model, candidates: list[np.ndarray], x: np.ndarray, q: np.ndarray,
              mask: np.ndarray, temperature_k: np.ndarray,
              keep: int = SEEDS_KEPT) -> np.ndarray:
    """Return the `keep` candidates with the smallest SSE per isotherm, best first.

    Shape (keep, n, k), clipped strictly inside the model's bounds.
    """
    cand = model.clip_to_bounds(np.stack(candidates, axis=0))
    sse = np.empty(cand.shape[:2])
    padded = not bool(np.all(mask))
    # One model call per candidate over the whole batch. Evaluating all
    # candidates in one stacked call (blocks of isotherms x candidates) was
    # measured no faster: the model's own arithmetic dominates, not the calls.
    with np.errstate(all="ignore"):
        for j in range(cand.shape[0]):
            fitted = model.evaluate(x, temperature_k, *np.split(cand[j], cand.shape[2], axis=1))
            resid = np.broadcast_to(fitted - q, q.shape)
            if padded:
                resid = np.where(mask, resid, 0.0)
            sse[j] = np.einsum("ij,ij->i", resid, resid)
    sse = np.where(np.isfinite(sse), sse, np.inf)
    order = np.argsort(sse, axis=0, kind="stable")[:keep]
    return np.take_along_axis(cand, order[:, :, None], axis=0)


def log_of_product(x: np.ndarray, affinity: np.ndarray) -> np.ndarray:
    """ln(affinity * x), -inf at x = 0 without a warning (models guard x > 0)."""
    with np.errstate(divide="ignore"):
        return np.log(affinity * x)


def exponent_affinity_grid(model, x: np.ndarray, q: np.ndarray, mask: np.ndarray,
                           exponents, x_lo: np.ndarray, x_hi: np.ndarray, q_hi: np.ndarray,
                           points: int) -> list[np.ndarray]:
    """Seeds (capacity, affinity, exponent) over a grid of exponents and
    affinities spanning the measured pressures, each with its least-squares
    capacity, for models shaped q = capacity * f(x; affinity, exponent)."""
    seeds = []
    for exponent in exponents:
        for affinity in log_grid(0.01 / x_hi, 100.0 / x_lo, points):
            shape = model.evaluate(x, None, 1.0, affinity, exponent)
            seeds.append(row(best_scale(q, shape, mask, q_hi), affinity, exponent))
    return seeds
