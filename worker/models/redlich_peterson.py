"""Redlich-Peterson (1959): three-parameter hybrid of Langmuir and Freundlich."""
from __future__ import annotations

import numpy as np

from .base import IsothermModel, Param
from .elementwise import zero_at_origin
from .linear import masked_linear_fit
from .seeding import best_scale, data_scales, keep_best, log_grid, row

_PRESSURE_GRID_POINTS = 9
_BETA_GRID = (1.0, 0.85, 0.7, 0.5)


def _log_p(x):
    with np.errstate(divide="ignore"):
        return np.log(x)


class RedlichPeterson(IsothermModel):
    id = "redlich_peterson"
    title = "Redlich-Peterson"
    equation = "q = k_rp * p / (1 + a_rp * p^beta)"
    reference = "O. Redlich, D. L. Peterson, J. Phys. Chem. 63 (1959) 1024"
    params = (
        Param("k_rp", "mol/kg/Pa", 0.0, np.inf, "initial slope (Henry constant)", log_scale=True),
        Param("a_rp", "1/Pa^beta", 0.0, np.inf, "Redlich-Peterson constant", log_scale=True),
        # beta = 1 is Langmuir (q_sat = k_rp / a_rp); beta -> 0 is Henry's law
        # with slope k_rp / (1 + a_rp); 0.05..1 keeps the loading increasing
        Param("beta", "-", 0.05, 1.0, "Redlich-Peterson exponent (1 = Langmuir)"),
    )
    henry_slope_from_exponent = True

    @staticmethod
    def evaluate(x, temperature_k, k_rp, a_rp, beta):
        return k_rp * x / (1.0 + a_rp * np.exp(beta * _log_p(x)))

    @staticmethod
    def jacobian(x, temperature_k, k_rp, a_rp, beta):
        log_p = _log_p(x)
        p_beta = np.exp(beta * log_p)
        denom = 1.0 + a_rp * p_beta
        d_k = x / denom
        d_a = -k_rp * x * p_beta / denom**2
        with np.errstate(invalid="ignore"):
            d_beta = zero_at_origin(d_a * a_rp * log_p, x)
        return d_k, d_a, d_beta

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        x_lo, x_hi, q_hi = data_scales(x, q, mask)
        candidates = []
        # linear form ln(k p / q - 1) = ln a + beta ln p, for trial slopes k
        # above the steepest observed q / p (so every term is positive)
        ok0 = mask & (x > 0) & (q > 0)
        steepest = np.max(np.where(ok0, q / np.where(ok0, x, 1.0), 0.0), axis=1, keepdims=True)
        steepest = np.where(steepest > 0, steepest, q_hi / x_hi)
        for factor in (1.1, 1.5, 3.0):
            k = factor * steepest
            with np.errstate(divide="ignore", invalid="ignore"):
                arg = k * x / q - 1.0
                ok = ok0 & (arg > 0)
                slope, intercept, _ = masked_linear_fit(_log_p(np.where(ok, x, 1.0)),
                                                        np.log(np.where(ok, arg, 1.0)), ok)
            beta = np.clip(np.nan_to_num(slope[:, None], nan=1.0), 0.05, 1.0)
            a = np.exp(np.clip(np.nan_to_num(intercept[:, None], nan=0.0), -700.0, 700.0))
            candidates.append(row(k, a, beta))
        # grid: a_rp p^beta = 1 at pressures across (and beyond) the data
        for beta in _BETA_GRID:
            for p_turn in log_grid(0.01 * x_lo, 100.0 * x_hi, _PRESSURE_GRID_POINTS):
                a = p_turn ** -beta
                shape = cls.evaluate(x, None, 1.0, a, beta)
                candidates.append(row(best_scale(q, shape, mask, steepest), a, np.full_like(a, beta)))
        return keep_best(cls, candidates, x, q, mask, temperature_k)

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        return params[:, 0].copy()
