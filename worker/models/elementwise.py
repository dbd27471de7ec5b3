"""Elementwise functions the models evaluate on every solver pass.

They are written with numpy's plain exp/log/log1p and arithmetic, which run
as SIMD loops, instead of ``np.logaddexp``, ``scipy.special.expit`` or
``np.where`` over the whole (isotherms, points) array, which were measured
several times slower per element (benchmarks/bench_engine.py shows the
effect end to end). Each function computes the same value for every element
whatever the rest of the array holds, so a row's result never depends on the
rows it is batched with.
"""
from __future__ import annotations

import numpy as np


def softplus(z: np.ndarray) -> np.ndarray:
    """ln(1 + e^z) without overflow: max(z, 0) + ln(1 + e^-|z|)."""
    return np.maximum(z, 0.0) + np.log1p(np.exp(-np.abs(z)))


def logistic(z: np.ndarray) -> np.ndarray:
    """1 / (1 + e^-z); e^-z overflowing to inf gives the exact limit 0."""
    with np.errstate(over="ignore"):
        return 1.0 / (1.0 + np.exp(-z))


def zero_at_origin(values: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``values`` with 0 where x <= 0, the limit of terms like p ln p there.

    Most batches hold no such point, and then the array is returned as it is
    (the values that are kept are the same either way).
    """
    nonpositive = ~(np.asarray(x) > 0)
    if not nonpositive.any():
        return values
    return np.where(nonpositive, 0.0, values)
