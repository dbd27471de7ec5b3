"""Sips (1948): Langmuir-Freundlich form for heterogeneous surfaces."""
from __future__ import annotations

import numpy as np

from .base import IsothermModel, Param
from .elementwise import logistic, zero_at_origin
from .linear import masked_linear_fit
from .seeding import (data_scales, keep_best, row,
                      exponent_affinity_grid, log_of_product)

_AFFINITY_GRID_POINTS = 9
_HETEROGENEITY_GRID = (1.0, 0.75, 0.5, 0.3)


class Sips(IsothermModel):
    id = "sips"
    title = "Sips (Langmuir-Freundlich)"
    equation = "q = q_sat * (affinity * p)^heterogeneity / (1 + (affinity * p)^heterogeneity)"
    reference = "R. Sips, J. Chem. Phys. 16 (1948) 490-495"
    params = (
        Param("q_sat", "mol/kg", 0.0, np.inf, "saturation capacity"),
        Param("affinity", "1/Pa", 0.0, np.inf, "affinity constant b", log_scale=True),
        # 1 is Langmuir; < 1 heterogeneous surface; bounded to 0.1..5 so the
        # exponent can neither flatten the isotherm to a constant nor make it a step
        Param("heterogeneity", "-", 0.1, 5.0, "heterogeneity exponent s (1 = Langmuir)"),
    )
    capacity_params = ("q_sat",)
    henry_slope_from_exponent = True

    @staticmethod
    def reduced_spreading_pressure(p, q_sat, affinity, heterogeneity):
        return q_sat / heterogeneity * np.log1p((affinity * p) ** heterogeneity)

    # the logistic form 1 / (1 + e^-(s ln(bp))) avoids overflow of (bp)^s at large bp
    @staticmethod
    def evaluate(x, temperature_k, q_sat, affinity, heterogeneity):
        return q_sat * logistic(heterogeneity * log_of_product(x, affinity))

    @staticmethod
    def jacobian(x, temperature_k, q_sat, affinity, heterogeneity):
        log_bp = log_of_product(x, affinity)
        z = heterogeneity * log_bp
        frac = logistic(z)
        bend = frac * logistic(-z)  # u / (1 + u)^2 with u = (bp)^s
        d_qsat = frac
        d_aff = q_sat * heterogeneity * bend / affinity
        with np.errstate(invalid="ignore"):
            d_het = zero_at_origin(q_sat * bend * log_bp, x)
        return d_qsat, d_aff, d_het

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        x_lo, x_hi, q_hi = data_scales(x, q, mask)
        candidates = []
        # linear form ln(q / (q_sat - q)) = s ln b + s ln p, for a few trial capacities
        for factor in (1.05, 1.3, 2.0):
            q_sat = factor * q_hi
            ok = mask & (x > 0) & (q > 0) & (q < q_sat)
            with np.errstate(divide="ignore", invalid="ignore"):
                slope, intercept, _ = masked_linear_fit(
                    np.log(np.where(ok, x, 1.0)),
                    np.log(np.where(ok, q / (q_sat - q), 1.0)), ok)
                s = np.clip(np.nan_to_num(slope[:, None], nan=1.0), 0.1, 5.0)
                b = np.exp(np.clip(intercept[:, None] / s, -700.0, 700.0))
            b = np.where(np.isfinite(b) & (b > 0), b, 1.0 / x_hi)
            candidates.append(row(q_sat, b, s))
        # grid over (s, b), each with its least-squares capacity
        candidates += exponent_affinity_grid(cls, x, q, mask, _HETEROGENEITY_GRID,
                                             x_lo, x_hi, q_hi, _AFFINITY_GRID_POINTS)
        return keep_best(cls, candidates, x, q, mask, temperature_k)

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        # q ~ q_sat (b p)^s at p -> 0: slope infinite for s < 1, zero for s > 1
        q_sat, b, s = params[:, 0], params[:, 1], params[:, 2]
        return np.where(s < 1.0, np.inf, np.where(s > 1.0, 0.0, q_sat * b))
