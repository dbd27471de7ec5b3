"""Langmuir (1918): one kind of site, monolayer, no lateral interactions."""
from __future__ import annotations

import numpy as np

from .base import IsothermModel, Param, masked_max
from .linear import masked_linear_fit


class Langmuir(IsothermModel):
    id = "langmuir"
    title = "Langmuir"
    equation = "q = q_sat * affinity * p / (1 + affinity * p)"
    reference = ("I. Langmuir, J. Am. Chem. Soc. 40 (1918) 1361-1403")
    params = (
        Param("q_sat", "mol/kg", 0.0, np.inf, "saturation capacity (monolayer)"),
        Param("affinity", "1/Pa", 0.0, np.inf, "affinity constant b", log_scale=True),
    )

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
        n = x.shape[0]
        seeds = []
        # double-reciprocal line 1/q = (1/(q_sat b)) (1/p) + 1/q_sat
        ok = mask & (x > 0) & (q > 0)
        slope, intercept, _ = masked_linear_fit(1.0 / np.where(ok, x, 1.0),
                                                1.0 / np.where(ok, q, 1.0), ok)
        good = (intercept > 0) & (slope > 0)
        q_lin = np.where(good, 1.0 / np.where(good, intercept, 1.0), np.nan)
        b_lin = np.where(good, intercept / np.where(good, slope, 1.0), np.nan)
        seeds.append(np.stack([q_lin, b_lin], axis=-1))
        # half-loading rule: q_sat ~ 1.2 max(q), b ~ 1 / (pressure at half max)
        q_max = masked_max(np.where(ok, q, -np.inf), ok)[:, 0]
        p_max = masked_max(np.where(ok, x, -np.inf), ok)[:, 0]
        seeds.append(np.stack([1.2 * q_max, 1.0 / np.maximum(p_max, 1e-300)], axis=-1))
        seeds.append(np.stack([3.0 * q_max, 0.1 / np.maximum(p_max, 1e-300)], axis=-1))
        out = np.stack(seeds, axis=0).reshape(len(seeds), n, 2)
        return cls.clip_to_bounds(out)

    @classmethod
    def saturation_capacity(cls, params):
        return params[:, 0]

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        return params[:, 0] * params[:, 1]
