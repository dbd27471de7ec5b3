"""Langmuir (1918): one kind of site, monolayer, no lateral interactions."""
from __future__ import annotations

import numpy as np

from .base import IsothermModel, Param
from .linear import masked_linear_fit
from .seeding import best_scale, data_scales, keep_best, log_grid, row

# affinity grid spans 1/(100 p_max) .. 100/p_min: from barely curved to
# saturated before the first point
_AFFINITY_GRID_POINTS = 13


class Langmuir(IsothermModel):
    id = "langmuir"
    title = "Langmuir"
    equation = "q = q_sat * affinity * p / (1 + affinity * p)"
    reference = "I. Langmuir, J. Am. Chem. Soc. 40 (1918) 1361-1403"
    params = (
        Param("q_sat", "mol/kg", 0.0, np.inf, "saturation capacity (monolayer)"),
        Param("affinity", "1/Pa", 0.0, np.inf, "affinity constant b", log_scale=True),
    )
    capacity_params = ("q_sat",)

    @staticmethod
    def reduced_spreading_pressure(p, q_sat, affinity):
        return q_sat * np.log1p(affinity * p)

    @staticmethod
    def evaluate(x, temperature_k, q_sat, affinity):
        bp = affinity * x
        return q_sat * bp / (1.0 + bp)

    @staticmethod
    def jacobian(x, temperature_k, q_sat, affinity):
        denom = 1.0 + affinity * x
        d_qsat = affinity * x / denom
        d_aff = q_sat * x / denom**2
        return d_qsat, d_aff

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        return keep_best(cls, cls.candidate_seeds(x, q, mask), x, q, mask, temperature_k)

    @classmethod
    def candidate_seeds(cls, x, q, mask):
        """Unranked candidates [(n, 2), ...]; the dual-site model reuses them."""
        x_lo, x_hi, q_hi = data_scales(x, q, mask)
        candidates = []
        # double-reciprocal line 1/q = (1/(q_sat b)) (1/p) + 1/q_sat
        ok = mask & (x > 0) & (q > 0)
        slope, intercept, _ = masked_linear_fit(1.0 / np.where(ok, x, 1.0),
                                                1.0 / np.where(ok, q, 1.0), ok)
        good = (intercept > 0) & (slope > 0)
        q_lin = np.where(good, 1.0 / np.where(good, intercept, 1.0), 1.2 * q_hi[:, 0])
        b_lin = np.where(good, intercept / np.where(good, slope, 1.0), 1.0 / x_hi[:, 0])
        candidates.append(row(q_lin[:, None], b_lin[:, None]))
        # half-loading rule: b ~ 1 / (pressure where q first reaches half its maximum)
        reached = mask & (q >= 0.5 * q_hi)
        p_half = np.min(np.where(reached, x, np.inf), axis=1, keepdims=True)
        p_half = np.where(np.isfinite(p_half) & (p_half > 0), p_half, x_hi)
        candidates.append(row(2.0 * q_hi, 1.0 / p_half))
        # affinity grid, each with its least-squares capacity
        for b in log_grid(0.01 / x_hi, 100.0 / x_lo, _AFFINITY_GRID_POINTS):
            shape = cls.evaluate(x, None, 1.0, b)
            candidates.append(row(best_scale(q, shape, mask, q_hi), b))
        return candidates

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        return params[:, 0] * params[:, 1]
