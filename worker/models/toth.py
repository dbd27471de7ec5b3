"""Toth (1971): heterogeneous-surface isotherm that keeps Henry's law at p -> 0."""
from __future__ import annotations

import numpy as np

from .base import IsothermModel, Param
from .elementwise import logistic, softplus, zero_at_origin
from .langmuir import Langmuir
from .seeding import (data_scales, keep_best, exponent_affinity_grid, log_of_product)

_AFFINITY_GRID_POINTS = 9
_T_GRID = (1.0, 0.7, 0.45, 0.3)


class Toth(IsothermModel):
    id = "toth"
    title = "Toth"
    equation = "q = q_sat * affinity * p / (1 + (affinity * p)^t)^(1/t)"
    reference = ("J. Toth, Acta Chim. Acad. Sci. Hung. 69 (1971) 311-328 "
                 "(page range from memory)")
    params = (
        Param("q_sat", "mol/kg", 0.0, np.inf, "saturation capacity"),
        Param("affinity", "1/Pa", 0.0, np.inf, "affinity constant b", log_scale=True),
        # 1 is Langmuir, < 1 heterogeneous; 0.1..5 keeps (1 + (bp)^t)^(1/t) tame
        Param("t", "-", 0.1, 5.0, "heterogeneity exponent (1 = Langmuir)"),
    )
    capacity_params = ("q_sat",)
    henry_slope_from_exponent = True

    # written as exp(ln(bp) - ln(1 + (bp)^t) / t) so large bp cannot overflow
    @staticmethod
    def evaluate(x, temperature_k, q_sat, affinity, t):
        log_bp = log_of_product(x, affinity)
        return q_sat * np.exp(log_bp - softplus(t * log_bp) / t)

    @staticmethod
    def jacobian(x, temperature_k, q_sat, affinity, t):
        log_bp = log_of_product(x, affinity)
        z = t * log_bp
        log_denom = softplus(z)   # ln(1 + (bp)^t)
        theta = np.exp(log_bp - log_denom / t)
        q = q_sat * theta
        d_aff = q * logistic(-z) / affinity   # (1 + (bp)^t)^-1
        with np.errstate(invalid="ignore"):
            d_t = zero_at_origin(q * (log_denom / t**2 - log_bp * logistic(z) / t), x)
        return theta, d_aff, d_t

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        x_lo, x_hi, q_hi = data_scales(x, q, mask)
        # t = 1 is Langmuir, so its linear-form seeds are Toth seeds too
        candidates = [np.concatenate([c, np.ones_like(c[:, :1])], axis=1)
                      for c in Langmuir.candidate_seeds(x, q, mask)[:2]]
        candidates += exponent_affinity_grid(cls, x, q, mask, _T_GRID,
                                             x_lo, x_hi, q_hi, _AFFINITY_GRID_POINTS)
        return keep_best(cls, candidates, x, q, mask, temperature_k)

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        return params[:, 0] * params[:, 1]
