"""Isosteric heat of adsorption by Clausius-Clapeyron at constant loading.

For each sorbent and gas with selected adsorption-branch fits at two or more
temperatures, each fit is inverted for p(n) on a common loading grid, and
ln p is regressed on 1/T: slope = -Qst / R. With exactly two isotherms this
is Qst = R ln(p2/p1) / (1/T1 - 1/T2) and has no standard error.
"""
from __future__ import annotations

import numpy as np
from scipy import constants

from ..packing import Packed
from ..results import ModelFits, Selection
from .common import (SAME_TEMPERATURE_TOLERANCE_K, max_measured_loading,
                     measured_pressure_range, rows_by, selected_pressure_at_loading)

# Loading grid: QST_GRID_POINTS evenly between these fractions of the smallest
# maximum measured loading of the group; the odd count puts QST_REFERENCE_FRACTION
# (the reported single value) on the grid.
QST_GRID_LOW_FRACTION = 0.05
QST_GRID_HIGH_FRACTION = 0.95
QST_GRID_POINTS = 11
QST_REFERENCE_FRACTION = 0.5
# Clausius-Clapeyron assumes Qst does not change over the temperature span, so
# only isotherms within a window T_max <= ratio * T_min are combined; a 77 K
# BET isotherm is never paired with ambient ones (common practice, no single
# source for the exact ratio).
QST_MAX_TEMPERATURE_RATIO = 1.5


def isosteric_groups(packed: Packed, usable: np.ndarray) -> list[tuple[str, str, np.ndarray]]:
    """(sorbent_id, adsorbate, rows) with usable adsorption fits at >= 2 temperatures."""
    adsorption = np.array([b == "adsorption" for b in packed.branches], dtype=bool)
    keep = usable & adsorption
    groups = rows_by(list(zip(packed.sorbent_ids, packed.adsorbates)), np.flatnonzero(keep))
    out = []
    for (sorbent_id, adsorbate), rows in sorted(groups.items()):
        rows = _temperature_window(np.array(rows), packed.temperature_k)
        if _distinct_temperatures(packed.temperature_k[rows]) >= 2:
            out.append((sorbent_id, adsorbate, rows))
    return out


def _temperature_window(rows: np.ndarray, temperature_k: np.ndarray) -> np.ndarray:
    """The rows of the largest set whose temperatures span at most
    QST_MAX_TEMPERATURE_RATIO (ties: the warmer set, where screening happens)."""
    rows = rows[np.argsort(temperature_k[rows], kind="stable")]
    t = temperature_k[rows]
    # for each start i, the end of the window [t_i, ratio * t_i]
    ends = np.searchsorted(t, QST_MAX_TEMPERATURE_RATIO * t, side="right")
    sizes = ends - np.arange(t.size)
    best = int(np.flatnonzero(sizes == sizes.max())[-1])
    return rows[best:ends[best]]


def _distinct_temperatures(temperature_k: np.ndarray) -> int:
    t = np.sort(temperature_k)
    return int(1 + np.sum(np.diff(t) > SAME_TEMPERATURE_TOLERANCE_K))


def isosteric_heat_rows(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                        usable: np.ndarray) -> list[dict]:
    groups = isosteric_groups(packed, usable)
    if not groups:
        return []
    fractions = np.linspace(QST_GRID_LOW_FRACTION, QST_GRID_HIGH_FRACTION, QST_GRID_POINTS)
    q_max = max_measured_loading(packed)
    grid = np.full((packed.n, QST_GRID_POINTS), np.nan)
    for _, _, rows in groups:
        grid[rows] = np.min(q_max[rows]) * fractions
    pressure = selected_pressure_at_loading(packed, fits, selection, grid)
    p_low, p_high = measured_pressure_range(packed)

    out = []
    for sorbent_id, adsorbate, rows in groups:
        with np.errstate(divide="ignore", invalid="ignore"):
            qst, stderr = clausius_clapeyron(packed.temperature_k[rows], pressure[rows])
        flags = []
        if not np.all(np.isfinite(qst)):
            flags.append("qst_inversion_failed")
        outside = (pressure[rows] < p_low[rows, None]) | (pressure[rows] > p_high[rows, None])
        if np.any(outside):
            flags.append("qst_extrapolated")
        if rows.size < 3:
            flags.append("qst_no_standard_error")
        ref = QST_GRID_POINTS // 2
        out.append({
            "sorbent_id": sorbent_id,
            "adsorbate": adsorbate,
            "kind": "isosteric_heat",
            "isotherm_ids": [packed.isotherm_ids[i] for i in rows],
            "temperatures_k": [float(t) for t in packed.temperature_k[rows]],
            "method": "two_point" if rows.size == 2 else "regression",
            "reference_loading_mol_per_kg": float(grid[rows[0], ref]),
            "isosteric_heat_j_per_mol": float(qst[ref]),
            "isosteric_heat_stderr_j_per_mol": float(stderr[ref]),
            "qst_loading_mol_per_kg": [float(v) for v in grid[rows[0]]],
            "qst_j_per_mol": [float(v) for v in qst],
            "qst_stderr_j_per_mol": [float(v) for v in stderr],
            "flags": flags,
        })
    return out


def clausius_clapeyron(temperature_k: np.ndarray, pressure_pa: np.ndarray
                       ) -> tuple[np.ndarray, np.ndarray]:
    """Qst and its standard error in J/mol, each (G,), from pressures (k, G) at k temperatures.

    Least squares of ln p on 1/T at each grid loading; the standard error is
    the slope's (k - 2 degrees of freedom), nan for k = 2.
    """
    inv_t = 1.0 / np.asarray(temperature_k, dtype=float)
    ln_p = np.log(pressure_pa)
    k = inv_t.size
    dx = inv_t - inv_t.mean()
    sxx = np.sum(dx * dx)
    slope = np.sum(dx[:, None] * (ln_p - ln_p.mean(axis=0)), axis=0) / sxx
    qst = -constants.R * slope
    if k < 3:
        return qst, np.full_like(qst, np.nan)
    residual = ln_p - ln_p.mean(axis=0) - slope * dx[:, None]
    slope_se = np.sqrt(np.sum(residual ** 2, axis=0) / (k - 2) / sxx)
    return qst, constants.R * slope_se
