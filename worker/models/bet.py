"""BET (1938) and GAB: multilayer adsorption against relative pressure x = p/p0."""
from __future__ import annotations

import numpy as np

from .base import IsothermModel, Param
from .linear import masked_linear_fit, masked_quadratic_fit
from .seeding import best_scale, data_scales, finite_positive, keep_best, row

# c spans type III-like (c < 1) to strongly microporous data; beyond 1e6 the
# knee sits below any measurable x and c is no longer identifiable
_C_LOWER, _C_UPPER = 1e-3, 1e6
_C_GRID = np.logspace(-1.0, 4.0, 11)
_K_GRID = (0.6, 0.8, 0.95)
# the customary BET window of relative pressure (common practice, no single source)
_BET_WINDOW = (0.05, 0.35)


def _henry_from_relative(slope_per_x, saturation_pressure_pa):
    """dq/dp from dq/dx at x -> 0; nan where p0 is unknown."""
    if saturation_pressure_pa is None:
        return np.full_like(slope_per_x, np.nan)
    return slope_per_x / np.asarray(saturation_pressure_pa, dtype=float)


class BET(IsothermModel):
    id = "bet"
    title = "Brunauer-Emmett-Teller (BET)"
    equation = "q = n_m * c * x / ((1 - x) * (1 - x + c * x)),  x = p / p0"
    reference = "S. Brunauer, P. H. Emmett, E. Teller, J. Am. Chem. Soc. 60 (1938) 309-319"
    relative_pressure = True
    multilayer = True
    params = (
        Param("n_m", "mol/kg", 0.0, np.inf, "monolayer capacity"),
        Param("c", "-", _C_LOWER, _C_UPPER, "BET constant (first layer vs liquefaction)",
              log_scale=True),
    )

    @staticmethod
    def evaluate(x, temperature_k, n_m, c):
        return n_m * c * x / ((1.0 - x) * (1.0 - x + c * x))

    @staticmethod
    def jacobian(x, temperature_k, n_m, c):
        layered = 1.0 - x + c * x
        d_nm = c * x / ((1.0 - x) * layered)
        d_c = n_m * x / layered**2
        return d_nm, d_c

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        _, _, q_hi = data_scales(x, q, mask)
        candidates = []
        # linear form x / (q (1 - x)) = 1/(n_m c) + (c - 1)/(n_m c) x, over all
        # points and over the customary window
        ok = mask & (x > 0) & (x < 1) & (q > 0)
        window = ok & (x >= _BET_WINDOW[0]) & (x <= _BET_WINDOW[1])
        with np.errstate(divide="ignore", invalid="ignore"):
            y = np.where(ok, x / (q * (1.0 - x)), 0.0)
        for use in (ok, window):
            slope, intercept, _ = masked_linear_fit(x, y, use)
            slope, intercept = slope[:, None], intercept[:, None]
            with np.errstate(divide="ignore", invalid="ignore"):
                n_m = finite_positive(1.0 / (slope + intercept), q_hi)
                c = finite_positive(slope / intercept + 1.0, np.full_like(q_hi, 100.0))
            candidates.append(row(n_m, c))
        for c in _C_GRID:
            shape = cls.evaluate(x, None, 1.0, c)
            candidates.append(row(best_scale(q, shape, mask, q_hi), np.full_like(q_hi, c)))
        return keep_best(cls, candidates, x, q, mask, temperature_k)

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        return _henry_from_relative(params[:, 0] * params[:, 1], saturation_pressure_pa)


class GAB(IsothermModel):
    id = "gab"
    title = "Guggenheim-Anderson-de Boer (GAB)"
    equation = "q = n_m * c * k * x / ((1 - k * x) * (1 - k * x + c * k * x)),  x = p / p0"
    reference = ("E. A. Guggenheim, Applications of Statistical Mechanics, Clarendon Press, "
                 "Oxford (1966); R. B. Anderson, J. Am. Chem. Soc. 68 (1946) 686-691; "
                 "J. H. de Boer, The Dynamical Character of Adsorption, Clarendon Press, "
                 "Oxford (1953) (bibliographic details from memory)")
    relative_pressure = True
    multilayer = True
    params = (
        Param("n_m", "mol/kg", 0.0, np.inf, "monolayer capacity"),
        Param("c", "-", _C_LOWER, _C_UPPER, "first-layer constant (as BET c)", log_scale=True),
        # k < 1: multilayers hold less than bulk liquid; k = 1 is BET. Below 0.01
        # the model is Langmuir in x with b = c k, and c, k separate no more
        Param("k", "-", 0.01, 1.0, "multilayer constant (1 = BET)"),
    )

    @staticmethod
    def evaluate(x, temperature_k, n_m, c, k):
        y = k * x
        return n_m * c * y / ((1.0 - y) * (1.0 - y + c * y))

    @staticmethod
    def jacobian(x, temperature_k, n_m, c, k):
        y = k * x
        layered = 1.0 - y + c * y
        d_nm = c * y / ((1.0 - y) * layered)
        d_c = n_m * y / layered**2
        d_k = x * n_m * c * (1.0 + (c - 1.0) * y**2) / ((1.0 - y) ** 2 * layered**2)
        return d_nm, d_c, d_k

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        _, _, q_hi = data_scales(x, q, mask)
        candidates = []
        # x/q is a parabola in x: x/q = [1 + (c-2) k x - (c-1) k^2 x^2] / (n_m c k)
        ok = mask & (x > 0) & (q > 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            sq, lin, const = masked_quadratic_fit(x, np.where(ok, x / q, 0.0), ok)
            u, v = lin / const, -sq / const          # (c-2) k and (c-1) k^2
            k = (-u + np.sqrt(u * u + 4.0 * v)) / 2.0
            c = u / k + 2.0
            n_m = 1.0 / (const * c * k)
        valid = np.isfinite(k) & np.isfinite(c) & np.isfinite(n_m) & (k > 0) & (c > 0) & (n_m > 0)
        candidates.append(row(np.where(valid, n_m, q_hi[:, 0])[:, None],
                              np.where(valid, c, 10.0)[:, None],
                              np.where(valid, k, 0.8)[:, None]))
        # BET seeds are GAB seeds with k = 1
        for bet in BET.initial_guesses(x, q, mask, temperature_k):
            candidates.append(row(bet[:, :1], bet[:, 1:], np.ones_like(q_hi)))
        for k in _K_GRID:
            for c in _C_GRID[::2]:
                shape = cls.evaluate(x, None, 1.0, c, k)
                candidates.append(row(best_scale(q, shape, mask, q_hi),
                                      np.full_like(q_hi, c), np.full_like(q_hi, k)))
        return keep_best(cls, candidates, x, q, mask, temperature_k)

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        n_m, c, k = params[:, 0], params[:, 1], params[:, 2]
        return _henry_from_relative(n_m * c * k, saturation_pressure_pa)
