"""Jovanovic (1969): monolayer uptake approaching its plateau exponentially.

Opt-in (``in_default_catalogue = False``): fitted only when named, so adding
it changed no default selection."""
from __future__ import annotations

import numpy as np
from scipy.special import exp1

from .base import IsothermModel, Param
from .seeding import best_scale, data_scales, finite_positive, keep_best, log_grid, row

_AFFINITY_GRID_POINTS = 13
# Ein(x) from its power series below this x, from E1(x) + ln x + gamma above:
# the latter cancels as x -> 0 (2e-6 relative error at x = 1e-10, 12 % at
# 1e-14); with 18 terms the series' first omitted term is below 1e-17 of the
# sum at x = 1 (measured against an 80-digit decimal sum: within 3e-16
# relative over 1e-14..30)
_SERIES_BELOW = 1.0
_SERIES_TERMS = 18


def ein(x: np.ndarray) -> np.ndarray:
    """Ein(x) = integral_0^x (1 - e^-t) / t dt, the entire exponential integral
    (DLMF 6.2.3 and 6.2.4, equation numbers from memory: Ein(x) = E1(x) + ln x
    + gamma for x > 0)."""
    x = np.asarray(x, dtype=float)
    small = np.minimum(x, _SERIES_BELOW)
    # sum_{k>=1} (-1)^(k+1) x^k / (k k!), summed from the smallest term up
    coefficients = [(-1.0) ** (k + 1) / (k * float(np.prod(np.arange(1, k + 1))))
                    for k in range(1, _SERIES_TERMS + 1)]
    series = np.zeros_like(small)
    for c in reversed(coefficients):
        series = (series + c) * small
    large = np.maximum(x, _SERIES_BELOW)
    closed = exp1(large) + np.log(large) + np.euler_gamma
    return np.where(x < _SERIES_BELOW, series, closed)


class Jovanovic(IsothermModel):
    id = "jovanovic"
    title = "Jovanovic"
    equation = "q = q_sat * (1 - exp(-affinity * p))"
    reference = "D. S. Jovanovic, Kolloid-Z. Z. Polym. 235 (1969) 1203 (initials from memory)"
    params = (
        Param("q_sat", "mol/kg", 0.0, np.inf, "saturation capacity (monolayer)"),
        Param("affinity", "1/Pa", 0.0, np.inf, "affinity constant b", log_scale=True),
    )
    capacity_params = ("q_sat",)
    # a new model must not change which model wins on data fitted before it
    in_default_catalogue = False

    @staticmethod
    def reduced_spreading_pressure(p, q_sat, affinity):
        # integral_0^p q_sat (1 - e^-bt) / t dt = q_sat Ein(b p)
        return q_sat * ein(affinity * p)

    # 1 - e^-bp as -expm1(-bp): exact to the last digit where bp is small,
    # which the Henry limit reads
    @staticmethod
    def evaluate(x, temperature_k, q_sat, affinity):
        return -q_sat * np.expm1(-affinity * x)

    @staticmethod
    def jacobian(x, temperature_k, q_sat, affinity):
        d_qsat = -np.expm1(-affinity * x)
        d_aff = q_sat * x * np.exp(-affinity * x)
        return d_qsat, d_aff

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        x_lo, x_hi, q_hi = data_scales(x, q, mask)
        candidates = []
        # half-loading rule: q = q_sat / 2 at b p = ln 2, taking q_sat near the
        # largest loading
        reached = mask & (q >= 0.5 * q_hi)
        p_half = np.min(np.where(reached, x, np.inf), axis=1, keepdims=True)
        p_half = finite_positive(p_half, x_hi)
        candidates.append(row(1.05 * q_hi, np.log(2.0) / p_half))
        # affinity grid, each with its least-squares capacity
        for b in log_grid(0.01 / x_hi, 100.0 / x_lo, _AFFINITY_GRID_POINTS):
            shape = cls.evaluate(x, None, 1.0, b)
            candidates.append(row(best_scale(q, shape, mask, q_hi), b))
        return keep_best(cls, candidates, x, q, mask, temperature_k)

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        # q -> q_sat b p as p -> 0
        return params[:, 0] * params[:, 1]
