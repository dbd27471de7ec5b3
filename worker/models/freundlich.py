"""Freundlich (1906): empirical power law for heterogeneous surfaces."""
from __future__ import annotations

import numpy as np

from .base import IsothermModel, Param
from .elementwise import zero_at_origin
from .linear import masked_linear_fit
from .seeding import best_scale, data_scales, keep_best, row


class Freundlich(IsothermModel):
    id = "freundlich"
    title = "Freundlich"
    equation = "q = k_f * p^(1/n)"
    reference = "H. Freundlich, Z. Phys. Chem. 57 (1906) 385-470 (from memory)"
    params = (
        Param("k_f", "mol/kg/Pa^(1/n)", 0.0, np.inf,
              "Freundlich capacity factor: loading at p = 1 Pa", log_scale=True),
        # n < 1 is a convex (unfavourable) isotherm; 0.2..20 covers published fits
        # while keeping p^(1/n) representable over 1e-3..1e8 Pa
        Param("n", "-", 0.2, 20.0, "Freundlich exponent (favourable when n > 1)"),
    )
    henry_slope_from_exponent = True

    @staticmethod
    def reduced_spreading_pressure(p, k_f, n):
        return n * k_f * p ** (1.0 / n)

    @staticmethod
    def evaluate(x, temperature_k, k_f, n):
        return k_f * x ** (1.0 / n)

    @staticmethod
    def jacobian(x, temperature_k, k_f, n):
        power = x ** (1.0 / n)
        with np.errstate(divide="ignore", invalid="ignore"):
            d_n = zero_at_origin(-k_f * power * np.log(x) / n**2, x)
        return power * np.ones_like(k_f), d_n

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        x_lo, x_hi, q_hi = data_scales(x, q, mask)
        candidates = []
        # log-log line: ln q = ln k_f + (1/n) ln p
        ok = mask & (x > 0) & (q > 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            slope, intercept, _ = masked_linear_fit(np.log(np.where(ok, x, 1.0)),
                                                    np.log(np.where(ok, q, 1.0)), ok)
            n_line = 1.0 / slope[:, None]
        n_line = np.where(np.isfinite(n_line) & (n_line > 0), n_line, 1.0)
        n_line = np.clip(n_line, cls.params[1].lower, cls.params[1].upper)
        k_line = np.exp(np.clip(intercept[:, None], -700.0, 700.0))
        candidates.append(row(np.where(np.isfinite(k_line), k_line, q_hi / x_hi), n_line))
        # fixed exponents, each with its least-squares k_f
        for n in (n_line, 0.5, 1.0, 2.0, 4.0):
            n_col = np.broadcast_to(n, q_hi.shape)
            shape = cls.evaluate(x, None, 1.0, n_col)
            candidates.append(row(best_scale(q, shape, mask, q_hi / x_hi ** (1.0 / n_col)), n_col))
        return keep_best(cls, candidates, x, q, mask, temperature_k)

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        # slope at p -> 0 of k_f p^(1/n): infinite for n > 1, zero for n < 1
        k_f, n = params[:, 0], params[:, 1]
        return np.where(n > 1.0, np.inf, np.where(n < 1.0, 0.0, k_f))
