"""Henry's law: loading proportional to pressure (the low-pressure limit)."""
from __future__ import annotations

import numpy as np

from .base import IsothermModel, Param
from .seeding import best_scale, data_scales, finite_positive, keep_best, row


class Henry(IsothermModel):
    id = "henry"
    title = "Henry's law"
    equation = "q = k_h * p"
    reference = ("W. Henry, Phil. Trans. R. Soc. Lond. 93 (1803) 29-42 and 274-276 "
                 "(page range from memory)")
    params = (
        Param("k_h", "mol/kg/Pa", 0.0, np.inf,
              "Henry constant: slope of loading against pressure", log_scale=True),
    )

    @staticmethod
    def reduced_spreading_pressure(p, k_h):
        return k_h * p

    @staticmethod
    def evaluate(x, temperature_k, k_h):
        return k_h * x

    @staticmethod
    def jacobian(x, temperature_k, k_h):
        return (x * np.ones_like(k_h),)

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        x_lo, x_hi, q_hi = data_scales(x, q, mask)
        fallback = q_hi / x_hi
        # least squares through the origin: the exact answer for this model
        through_origin = best_scale(q, x, mask, fallback)
        # ln q - ln p averaged over the low-pressure half (log-spaced), where
        # Henry's law holds best even for data that bend over later
        low = mask & (x > 0) & (q > 0) & (x <= np.sqrt(x_lo * x_hi))
        with np.errstate(divide="ignore", invalid="ignore"):
            log_ratio = np.where(low, np.log(np.where(low, q / x, 1.0)), 0.0)
            mean_log = log_ratio.sum(axis=1, keepdims=True) / low.sum(axis=1, keepdims=True)
        low_slope = finite_positive(np.exp(mean_log), fallback)
        candidates = [row(through_origin), row(low_slope), row(fallback)]
        return keep_best(cls, candidates, x, q, mask, temperature_k)

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        return params[:, 0].copy()
