"""Temkin & Pyzhev (1940): heat of adsorption falling linearly with coverage."""
from __future__ import annotations

import numpy as np
from scipy.constants import R

from .base import IsothermModel, Param
from .linear import masked_linear_fit
from .seeding import data_scales, keep_best, row


def _log_ap(x, a_t):
    with np.errstate(divide="ignore"):
        return np.log(a_t * x)


class Temkin(IsothermModel):
    id = "temkin"
    title = "Temkin"
    equation = "q = (R * T / b_t) * ln(a_t * p)"
    reference = ("M. I. Temkin, V. Pyzhev, Acta Physicochim. URSS 12 (1940) 327-356 "
                 "(journal details from memory)")
    params = (
        Param("a_t", "1/Pa", 0.0, np.inf, "Temkin equilibrium binding constant", log_scale=True),
        Param("b_t", "J kg/mol^2", 0.0, np.inf,
              "Temkin constant: fall of adsorption heat per unit loading", log_scale=True),
    )

    @staticmethod
    def evaluate(x, temperature_k, a_t, b_t):
        return R * temperature_k / b_t * _log_ap(x, a_t)

    @staticmethod
    def jacobian(x, temperature_k, a_t, b_t):
        rt = R * temperature_k
        d_a = rt / (b_t * a_t) * np.ones_like(x)
        d_b = -rt / b_t**2 * _log_ap(x, a_t)
        return d_a, d_b

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        x_lo, x_hi, q_hi = data_scales(x, q, mask)
        rt = R * np.broadcast_to(temperature_k, q_hi.shape)
        # straight line q = (RT/b_t) ln a_t + (RT/b_t) ln p
        ok = mask & (x > 0) & np.isfinite(q)
        slope, intercept, _ = masked_linear_fit(np.log(np.where(ok, x, 1.0)), q, ok)
        slope, intercept = slope[:, None], intercept[:, None]
        good = np.isfinite(slope) & (slope > 0)
        safe_slope = np.where(good, slope, 1.0)
        b_line = np.where(good, rt / safe_slope, rt / q_hi)
        a_line = np.where(good, np.exp(np.clip(intercept / safe_slope, -700.0, 700.0)), 1.0 / x_lo)
        # fall-back: loading rises by q_max across the pressure range, zero at p_min
        spread = np.log(np.maximum(x_hi / x_lo, np.e))
        b_fall = rt * spread / q_hi
        candidates = [row(a_line, b_line), row(1.0 / x_lo, b_fall)]
        return keep_best(cls, candidates, x, q, mask, temperature_k)
