"""Dubinin-Radushkevich (1947) and Dubinin-Astakhov (1971): micropore filling.

Both use the adsorption potential A = R T ln(1/x), x = p/p0. Above x = 1 the
pores are full, so x is capped at 1 (A = 0, q = q_m).
"""
from __future__ import annotations

import numpy as np
from scipy.constants import R

from .base import IsothermModel, Param
from .elementwise import zero_at_origin
from .linear import masked_linear_fit
from .seeding import best_scale, data_scales, keep_best, row

# characteristic energies of published micropore fits lie in ~1..60 kJ/mol;
# the bounds leave a decade either side
_E_LOWER, _E_UPPER = 100.0, 1e6
_DA_EXPONENT_GRID = (1.0, 1.5, 2.0, 3.0, 4.0, 5.0)


def _potential_j_per_mol(x, temperature_k):
    """Adsorption potential A = R T ln(1/x) in J/mol (0 at and above x = 1)."""
    with np.errstate(divide="ignore"):
        return R * temperature_k * -np.log(np.minimum(x, 1.0))


def _line_seed(x, q, mask, temperature_k, exponent, q_fallback):
    """(q_m, e) from the straight line ln q = ln q_m - (R T / e)^n (ln 1/x)^n."""
    ok = mask & (x > 0) & (x < 1) & (q > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(ok, (-np.log(np.where(ok, x, 0.5))) ** exponent, 0.0)
        slope, intercept, _ = masked_linear_fit(w, np.log(np.where(ok, q, 1.0)), ok)
        e = R * temperature_k[:, 0] * (-slope) ** (-1.0 / exponent)
    q_m = np.exp(np.clip(intercept, -700.0, 700.0))
    good = np.isfinite(e) & (e > 0) & np.isfinite(q_m) & (q_m > 0)
    # fall-back: half the capacity filled at the middle real point's potential
    a_mid = np.median(np.where(ok, _potential_j_per_mol(x, temperature_k), np.nan), axis=1)
    with np.errstate(invalid="ignore"):
        e_fall = np.nan_to_num(a_mid / np.log(2.0) ** (1.0 / exponent), nan=1e4)
    return (np.where(good, q_m, 2.0 * q_fallback[:, 0])[:, None],
            np.where(good, e, np.maximum(e_fall, _E_LOWER))[:, None])


class DubininRadushkevich(IsothermModel):
    id = "dubinin_radushkevich"
    title = "Dubinin-Radushkevich"
    equation = "q = q_m * exp(-(A / e)^2),  A = R * T * ln(1 / x),  x = p / p0"
    reference = ("M. M. Dubinin, L. V. Radushkevich, Proc. Acad. Sci. USSR, Phys. Chem. Sect. "
                 "55 (1947) 331 (from memory)")
    relative_pressure = True
    pore_filling = True
    params = (
        Param("q_m", "mol/kg", 0.0, np.inf, "micropore capacity (loading at x = 1)"),
        Param("e", "J/mol", _E_LOWER, _E_UPPER, "characteristic energy", log_scale=True),
    )
    capacity_params = ("q_m",)

    @staticmethod
    def evaluate(x, temperature_k, q_m, e):
        return q_m * np.exp(-((_potential_j_per_mol(x, temperature_k) / e) ** 2))

    @staticmethod
    def jacobian(x, temperature_k, q_m, e):
        a = _potential_j_per_mol(x, temperature_k)
        filled = np.exp(-((a / e) ** 2))
        with np.errstate(invalid="ignore"):
            d_e = zero_at_origin(q_m * filled * 2.0 * a**2 / e**3, x)
        return filled, d_e

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        _, _, q_hi = data_scales(x, q, mask)
        q_m, e = _line_seed(x, q, mask, temperature_k, 2.0, q_hi)
        candidates = [row(q_m, e)]
        for factor in (0.3, 1.0, 3.0):
            shape = cls.evaluate(x, temperature_k, 1.0, factor * e)
            candidates.append(row(best_scale(q, shape, mask, q_hi), factor * e))
        return keep_best(cls, candidates, x, q, mask, temperature_k)

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        # exp(-k ln(x)^2) vanishes faster than any power of x: zero slope
        return np.zeros(params.shape[0])


class DubininAstakhov(IsothermModel):
    id = "dubinin_astakhov"
    title = "Dubinin-Astakhov"
    equation = "q = q_m * exp(-(A / e)^n),  A = R * T * ln(1 / x),  x = p / p0"
    reference = ("M. M. Dubinin, V. A. Astakhov, Adv. Chem. Ser. 102 (1971) 69-85 "
                 "(from memory)")
    relative_pressure = True
    pore_filling = True
    params = (
        Param("q_m", "mol/kg", 0.0, np.inf, "micropore capacity (loading at x = 1)"),
        Param("e", "J/mol", _E_LOWER, _E_UPPER, "characteristic energy", log_scale=True),
        # n = 2 is DR; published fits use ~1..6; 0.5..8 keeps exp(-(A/e)^n) tame
        Param("n", "-", 0.5, 8.0, "heterogeneity exponent (2 = Dubinin-Radushkevich)"),
    )
    capacity_params = ("q_m",)
    henry_slope_from_exponent = True

    @staticmethod
    def evaluate(x, temperature_k, q_m, e, n):
        return q_m * np.exp(-((_potential_j_per_mol(x, temperature_k) / e) ** n))

    @staticmethod
    def jacobian(x, temperature_k, q_m, e, n):
        ratio = _potential_j_per_mol(x, temperature_k) / e
        power = ratio**n
        filled = np.exp(-power)
        q = q_m * filled
        inside = (x > 0) & (ratio > 0)
        with np.errstate(invalid="ignore", divide="ignore"):
            d_e = np.where(inside, q * n * power / e, 0.0)
            d_n = np.where(inside, -q * power * np.log(np.where(inside, ratio, 1.0)), 0.0)
        return filled, d_e, d_n

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        _, _, q_hi = data_scales(x, q, mask)
        candidates = []
        for n in _DA_EXPONENT_GRID:
            q_m, e = _line_seed(x, q, mask, temperature_k, n, q_hi)
            candidates.append(row(q_m, e, np.full_like(q_m, n)))
        return keep_best(cls, candidates, x, q, mask, temperature_k)

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        # q ~ q_m exp(-(RT/e)^n ln(1/x)^n) at x -> 0: the slope vanishes for
        # n > 1 and diverges for n < 1; at n = 1, q = q_m x^(RT/e)
        q_m, e, n = params[:, 0], params[:, 1], params[:, 2]
        kappa = R * np.asarray(temperature_k, dtype=float).reshape(-1) / e
        if saturation_pressure_pa is None:
            p0 = np.full_like(q_m, np.nan)
        else:
            p0 = np.asarray(saturation_pressure_pa, dtype=float).reshape(-1)
        at_one = np.where(kappa > 1.0, 0.0, np.where(kappa < 1.0, np.inf, q_m / p0))
        return np.where(n > 1.0, 0.0, np.where(n < 1.0, np.inf, at_one))
