"""Hysteresis between the adsorption and desorption branches of one sorbent, gas
and temperature, from the measured points (docs/results.md, "Branches and
hysteresis").

Each adsorption isotherm is paired with the first desorption isotherm of the
batch with the same sorbent and gas at the same temperature (within
SAME_TEMPERATURE_TOLERANCE_K). Both branches are interpolated linearly in
pressure (replicates averaged) on a common grid: every measured pressure of
either branch inside the pressure range both cover. The width is desorption
minus adsorption loading on that grid.

Tolerance: TOLERANCE_FRACTION of the adsorption branch's highest loading
(common practice for "the branches coincide", no single source; it assumes
loading noise well below that). The loop is open where the width exceeds the
tolerance at OPEN_POINTS or more consecutive grid pressures (one noisy point
is no loop); flag ``hysteresis`` when it is open anywhere. The closure
pressure is the lower closure point: from the widest grid point down, the
first grid pressure where the width is back within the tolerance (nan, with
the flag ``hysteresis_open_at_lowest_overlap``, when the loop is still open
at the lowest pressure both branches cover). A model fit is not used: the
models of the catalogue do not describe a capillary-condensation step.
"""
from __future__ import annotations

import numpy as np

from ..packing import Packed
from .common import SAME_TEMPERATURE_TOLERANCE_K, add_flag, rows_by

TOLERANCE_FRACTION = 0.02
OPEN_POINTS = 2


def hysteresis_columns(packed: Packed, flags: list[list[str]]) -> dict[str, np.ndarray]:
    """Hysteresis columns (n,), filled on adsorption rows that have a desorption partner."""
    n = packed.n
    out = {name: np.full(n, np.nan) for name in (
        "hysteresis_max_width_mol_per_kg", "hysteresis_max_width_pressure_pa",
        "hysteresis_closure_pressure_pa", "hysteresis_closure_relative_pressure",
        "hysteresis_tolerance_mol_per_kg")}
    partner_id = np.full(n, None, dtype=object)
    loop = np.zeros(n, dtype=bool)
    still_open = np.zeros(n, dtype=bool)
    keys = list(zip(packed.sorbent_ids, packed.adsorbates))
    for rows in rows_by(keys, range(n)).values():
        desorption = [r for r in rows if packed.branches[r] == "desorption"]
        if not desorption:
            continue
        for a in (r for r in rows if packed.branches[r] == "adsorption"):
            d = next((r for r in desorption if abs(packed.temperature_k[r] - packed.temperature_k[a])
                      <= SAME_TEMPERATURE_TOLERANCE_K), None)
            if d is None:
                continue
            found = _loop(packed, a, d)
            if found is None:
                continue
            width, at_pa, closure_pa, tolerance, is_loop, is_open = found
            partner_id[a] = packed.isotherm_ids[d]
            out["hysteresis_max_width_mol_per_kg"][a] = width
            out["hysteresis_max_width_pressure_pa"][a] = at_pa
            out["hysteresis_closure_pressure_pa"][a] = closure_pa
            out["hysteresis_tolerance_mol_per_kg"][a] = tolerance
            loop[a], still_open[a] = is_loop, is_open
    with np.errstate(invalid="ignore"):
        out["hysteresis_closure_relative_pressure"] = \
            out["hysteresis_closure_pressure_pa"] / packed.saturation_pressure_pa
    out["hysteresis_desorption_isotherm_id"] = partner_id
    add_flag(flags, loop, "hysteresis")
    add_flag(flags, still_open, "hysteresis_open_at_lowest_overlap")
    return out


def _branch(packed: Packed, row: int) -> tuple[np.ndarray, np.ndarray]:
    """Distinct pressures (sorted) and the mean loading at each, of one isotherm."""
    real = packed.mask[row]
    p, q = packed.pressure_pa[row, real], packed.loading_mol_per_kg[row, real]
    order = np.argsort(p, kind="stable")
    pressures, inverse = np.unique(p[order], return_inverse=True)
    mean = np.bincount(inverse, weights=q[order]) / np.bincount(inverse)
    return pressures, mean


def _loop(packed: Packed, ads: int, des: int
          ) -> tuple[float, float, float, float, bool, bool] | None:
    """(max width, its pressure, closure pressure, tolerance, loop?, open at the low end?)
    of one adsorption/desorption pair, or None where their pressures do not overlap."""
    p_a, q_a = _branch(packed, ads)
    p_d, q_d = _branch(packed, des)
    low, high = max(p_a[0], p_d[0]), min(p_a[-1], p_d[-1])
    grid = np.union1d(p_a, p_d)
    grid = grid[(grid >= low) & (grid <= high)]
    if grid.size < 2:
        return None
    width = np.interp(grid, p_d, q_d) - np.interp(grid, p_a, q_a)
    tolerance = TOLERANCE_FRACTION * float(np.max(q_a))
    above = width > tolerance
    widest = int(np.argmax(width))
    is_loop = above.size >= OPEN_POINTS and \
        bool(np.convolve(above, np.ones(OPEN_POINTS, dtype=int), "valid").max() >= OPEN_POINTS)
    closure, is_open = np.nan, False
    if is_loop:
        closed = np.flatnonzero(width[:widest] <= tolerance)
        if closed.size:
            closure = float(grid[closed[-1]])
        else:
            is_open = True
    return float(width[widest]), float(grid[widest]), closure, tolerance, is_loop, is_open
