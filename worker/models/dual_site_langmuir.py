"""Dual-site Langmuir: two independent kinds of Langmuir site, loadings add."""
from __future__ import annotations

import numpy as np

from .base import IsothermModel, Param
from .langmuir import Langmuir
from .seeding import data_scales, keep_best, log_grid, row

# per-site affinity grid; every pair (strong, weak) of it becomes a candidate
_AFFINITY_GRID_POINTS = 9


class DualSiteLangmuir(IsothermModel):
    id = "dual_site_langmuir"
    title = "Dual-site Langmuir"
    equation = ("q = q_sat_1 * affinity_1 * p / (1 + affinity_1 * p)"
                " + q_sat_2 * affinity_2 * p / (1 + affinity_2 * p)")
    reference = ("I. Langmuir, J. Am. Chem. Soc. 40 (1918) 1361-1403 (surfaces with several "
                 "kinds of elementary space, loadings summed; the two-site form as used in "
                 "screening is common practice, no single source)")
    params = (
        Param("q_sat_1", "mol/kg", 0.0, np.inf, "capacity of site 1 (the stronger site)"),
        Param("affinity_1", "1/Pa", 0.0, np.inf, "affinity of site 1 (>= affinity_2)",
              log_scale=True),
        Param("q_sat_2", "mol/kg", 0.0, np.inf, "capacity of site 2 (the weaker site)"),
        Param("affinity_2", "1/Pa", 0.0, np.inf, "affinity of site 2", log_scale=True),
    )
    capacity_params = ("q_sat_1", "q_sat_2")

    @staticmethod
    def reduced_spreading_pressure(p, q_sat_1, affinity_1, q_sat_2, affinity_2):
        return q_sat_1 * np.log1p(affinity_1 * p) + q_sat_2 * np.log1p(affinity_2 * p)

    @staticmethod
    def evaluate(x, temperature_k, q_sat_1, affinity_1, q_sat_2, affinity_2):
        return (Langmuir.evaluate(x, temperature_k, q_sat_1, affinity_1)
                + Langmuir.evaluate(x, temperature_k, q_sat_2, affinity_2))

    @staticmethod
    def jacobian(x, temperature_k, q_sat_1, affinity_1, q_sat_2, affinity_2):
        return (Langmuir.jacobian(x, temperature_k, q_sat_1, affinity_1)
                + Langmuir.jacobian(x, temperature_k, q_sat_2, affinity_2))

    @classmethod
    def initial_guesses(cls, x, q, mask, temperature_k):
        x_lo, x_hi, q_hi = data_scales(x, q, mask)
        grid = log_grid(0.01 / x_hi, 100.0 / x_lo, _AFFINITY_GRID_POINTS)
        shapes = [Langmuir.evaluate(x, None, 1.0, b) for b in grid]
        w = mask.astype(float)
        q0 = np.where(mask, q, 0.0)
        candidates = []
        for i_weak in range(len(grid)):
            for i_strong in range(i_weak + 1, len(grid)):
                g1, g2 = shapes[i_strong], shapes[i_weak]
                q1, q2 = _two_scales(g1 * w, g2 * w, q0, q_hi)
                candidates.append(row(q1, grid[i_strong], q2, grid[i_weak]))
        # one-site seeds split evenly over two sites a decade apart either side
        for q_sat, b in (c.T[:, :, None] for c in Langmuir.candidate_seeds(x, q, mask)[:2]):
            candidates.append(row(0.5 * q_sat, 3.0 * b, 0.5 * q_sat, b / 3.0))
        return keep_best(cls, candidates, x, q, mask, temperature_k)

    @classmethod
    def canonical(cls, params):
        # the two sites are interchangeable; list the higher-affinity one first
        swap = params[:, 1] < params[:, 3]
        out = params.copy()
        out[swap] = params[swap][:, [2, 3, 0, 1]]
        return out

    @classmethod
    def henry_constant(cls, params, temperature_k, saturation_pressure_pa=None):
        return params[:, 0] * params[:, 1] + params[:, 2] * params[:, 3]


def _two_scales(g1, g2, q, fallback):
    """Least-squares capacities (q1, q2), each (n, 1), for q ~ q1 g1 + q2 g2.

    Where the pair has no positive solution both capacities share the data's
    largest loading; the ranking then decides whether the seed is any good.
    """
    s11 = (g1 * g1).sum(axis=1, keepdims=True)
    s22 = (g2 * g2).sum(axis=1, keepdims=True)
    s12 = (g1 * g2).sum(axis=1, keepdims=True)
    r1 = (g1 * q).sum(axis=1, keepdims=True)
    r2 = (g2 * q).sum(axis=1, keepdims=True)
    det = s11 * s22 - s12 * s12
    with np.errstate(invalid="ignore", divide="ignore"):
        q1 = (s22 * r1 - s12 * r2) / det
        q2 = (s11 * r2 - s12 * r1) / det
    ok = np.isfinite(q1) & np.isfinite(q2) & (q1 > 0) & (q2 > 0) & (det > 1e-12 * s11 * s22)
    return np.where(ok, q1, 0.5 * fallback), np.where(ok, q2, 0.5 * fallback)
