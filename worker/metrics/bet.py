"""BET surface area on the raw data, with an automatic, consistency-checked p/p0 range.

Every contiguous window of points is a candidate range. Prefix sums make each
window's straight-line fit of the BET plot, x / (n (1 - x)) against x = p/p0,
an O(1) computation, so all windows of all isotherms are evaluated as arrays.

A window is accepted when
  * it has at least BET_MIN_POINTS points;
  * the four consistency criteria hold (ISO 9277; IUPAC 2015 report,
    Thommes et al., Pure Appl. Chem. 87 (2015) 1051):
    (1) n (1 - x) increases with x across the window,
    (2) C > 0,
    (3) x_m = 1 / (sqrt(C) + 1), where n = n_m, lies inside the window,
    (4) x_m agrees within BET_MONOLAYER_PRESSURE_TOLERANCE with the x read
        (linear interpolation) from the data at n = n_m;
  * its BET plot is linear: R^2 >= BET_MIN_R2;
  * it stays below the multilayer region. Two guards, both needed because
    the widest range that merely passes the above reaches into the
    multilayer / capillary-condensation rise and biases the area:
    - its upper end is at or below the maximum of n (1 - x) (the knee of
      that plot, where criterion 1 first fails for the isotherm as a whole);
    - every point added on the way up agrees with the line through the
      points below it, within the BET_BEND_CONFIDENCE prediction interval
      (a rising multilayer shows up as points falling below the line).
Among accepted windows the one starting lowest wins, then the one with the
most points, then the higher R^2: a wide window lying wholly in the
multilayer region can pass every test above (its fitted C is small enough to
put x_m inside it), and starting at the lowest accepted point keeps the range
on the first linear stretch of the BET plot, the one around the monolayer.
"""
from __future__ import annotations

import numpy as np
# scipy.special, not scipy.stats: the same quantile functions (stats.t.ppf and
# stats.norm.ppf call them) without the 0.5 s import of scipy.stats at every start
from scipy import constants
from scipy.special import stdtrit

from ..adsorbates import ADSORBATES, lookup, supercooled_liquid_saturation_pressure_pa
from ..packing import Packed
from .common import add_flag, positive_interval_95

# Cross-sectional areas (nm2) come from the adsorbate table, which cites
# them: N2 at 77 K 0.162 (IUPAC 2015, Thommes et al., Pure Appl. Chem. 87
# (2015) 1051); Ar at 87 K 0.142 and Kr at 77 K 0.202 (same report, from memory).
CROSS_SECTION_NM2 = {gas: ADSORBATES[gas].cross_section_nm2 for gas in ("N2", "Ar", "Kr")}
# Normal boiling points used as the usual measuring temperature (from memory).
USUAL_TEMPERATURE_K = {"N2": 77.35, "Ar": 87.30, "Kr": 77.35}
BET_TEMPERATURE_TOLERANCE_K = 3.0

BET_MIN_POINTS = 3
BET_MIN_R2 = 0.9995
BET_MONOLAYER_PRESSURE_TOLERANCE = 0.10
BET_BEND_CONFIDENCE = 0.99
# criterion 1 tolerates a fall of n(1 - x) up to this many sigma of the point noise
BET_RISE_NOISE_SIGMAS = 2.0
# below this relative size a deviation is rounding, not curvature
BET_BEND_RELATIVE_FLOOR = 1e-9
# window arrays hold m^2 entries per isotherm; blocks keep each near this size
BET_BLOCK_ENTRIES = 500_000

CRITERIA_LABELS = ("1", "2", "3", "4")

BET_COLUMNS = ("bet_area_m2_per_g", "bet_area_stderr_m2_per_g", "bet_area_ci95_low_m2_per_g",
               "bet_area_ci95_high_m2_per_g", "bet_c", "bet_monolayer_mol_per_kg",
               "bet_monolayer_stderr_mol_per_kg",
               "bet_range_relative_pressure_low", "bet_range_relative_pressure_high",
               "bet_r2", "bet_n_points")


def bet_gas(adsorbate: str) -> str | None:
    """The canonical BET gas id (N2, Ar, Kr) for an adsorbate name, or None."""
    found = lookup(adsorbate)
    return found.id if found is not None and found.id in CROSS_SECTION_NM2 else None


def bet_area_m2_per_g(monolayer_mol_per_kg: np.ndarray, cross_section_nm2: np.ndarray) -> np.ndarray:
    """Area in m2/g covered by a monolayer of molecules of the given cross-section."""
    return (np.asarray(monolayer_mol_per_kg) / 1000.0 * constants.Avogadro
            * np.asarray(cross_section_nm2) * 1e-18)


def bet_columns(packed: Packed, flags: list[list[str]]) -> dict[str, np.ndarray]:
    """BET columns (length n); nan and a flag where no range satisfies every condition."""
    n = packed.n
    out = {name: np.full(n, np.nan) for name in BET_COLUMNS}
    out["bet_criteria"] = np.full(n, None, dtype=object)

    gas = [bet_gas(a) for a in packed.adsorbates]
    is_bet_gas = np.array([g is not None for g in gas], dtype=bool)
    usual_t = np.array([USUAL_TEMPERATURE_K[g] if g else np.nan for g in gas])
    cross_section = np.array([CROSS_SECTION_NM2[g] if g else np.nan for g in gas])
    at_usual_t = np.abs(packed.temperature_k - usual_t) <= BET_TEMPERATURE_TOLERANCE_K
    has_p0 = np.isfinite(packed.saturation_pressure_pa) & (packed.saturation_pressure_pa > 0)
    adsorption = np.array([b == "adsorption" for b in packed.branches], dtype=bool)

    # a BET gas far from its usual temperature is flagged only where it is
    # still subcritical (BET might have been meant); N2 or Ar at ambient
    # temperature are ordinary screening isotherms, not BET measurements
    add_flag(flags, is_bet_gas & ~at_usual_t & has_p0, "bet_unusual_temperature")
    add_flag(flags, is_bet_gas & at_usual_t & ~has_p0, "bet_no_saturation_pressure")
    # Kr (and Ar) at 77 K: the relative pressures refer to the supercooled liquid
    supercooled = np.array([supercooled_liquid_saturation_pressure_pa(g, t) if g else None
                            for g, t in zip(gas, packed.temperature_k)], dtype=float)
    with np.errstate(invalid="ignore"):
        add_flag(flags, has_p0 & (np.abs(packed.saturation_pressure_pa / supercooled - 1.0) <= 1e-9),
                 "p0_supercooled_liquid")
    add_flag(flags, is_bet_gas & at_usual_t & has_p0 & ~adsorption, "bet_not_adsorption_branch")
    todo = np.flatnonzero(is_bet_gas & at_usual_t & has_p0 & adsorption)

    m = packed.pressure_pa.shape[1]
    block = max(1, BET_BLOCK_ENTRIES // max(m * m, 1))
    for start in range(0, todo.size, block):
        rows = todo[start:start + block]
        found = best_bet_ranges(packed.relative_pressure[rows],
                                packed.loading_mol_per_kg[rows], packed.mask[rows])
        for name in BET_COLUMNS:
            if name in found:
                out[name][rows] = found[name]
        out["bet_criteria"][rows] = found["bet_criteria"]
        area = bet_area_m2_per_g(found["bet_monolayer_mol_per_kg"], cross_section[rows])
        area_se = bet_area_m2_per_g(found["bet_monolayer_stderr_mol_per_kg"], cross_section[rows])
        low, high = positive_interval_95(area, area_se, found["bet_n_points"] - 2.0)
        out["bet_area_m2_per_g"][rows] = area
        out["bet_area_stderr_m2_per_g"][rows] = area_se
        out["bet_area_ci95_low_m2_per_g"][rows] = low
        out["bet_area_ci95_high_m2_per_g"][rows] = high
        no_range = np.zeros(n, dtype=bool)
        no_range[rows[~found["valid"]]] = True
        add_flag(flags, no_range, "bet_no_valid_range")
    return out


def best_bet_ranges(relative_pressure: np.ndarray, loading_mol_per_kg: np.ndarray,
                    mask: np.ndarray, guard_multilayer: bool = True) -> dict[str, np.ndarray]:
    """The chosen BET range and its fit for each row (g isotherms, m points).

    Returns arrays of length g: valid, bet_c, bet_monolayer_mol_per_kg,
    bet_monolayer_stderr_mol_per_kg (delta method, from the BET line),
    bet_range_relative_pressure_low/high, bet_r2, bet_n_points and
    bet_criteria (for a valid range "1,2,3,4"; otherwise the criteria held by
    the best linear window, for diagnosis, with every number left nan).
    ``guard_multilayer=False`` drops the multilayer guards (knee, bend test,
    lowest start) and takes the widest range that merely passes the criteria;
    it exists to show what the guards prevent.
    """
    x, q, valid, n_valid = _valid_points_first(relative_pressure, loading_mol_per_kg, mask)
    g, m = x.shape
    a = np.arange(m)[:, None]               # window start index
    b = np.arange(m)[None, :]               # window end index (inclusive)
    n_w = (b - a + 1).astype(float)
    inside = (b - a + 1 >= BET_MIN_POINTS)[None] & (b < n_valid[:, None, None])

    with np.errstate(all="ignore"):
        y = np.where(valid, x / (q * (1.0 - x)), 0.0)
        rouquerol = np.where(valid, q * (1.0 - x), -np.inf)
        fit = _window_fits(x, y, valid, a, b)
        fit_below = {k: _shift_end(v) for k, v in fit.items()}  # window [a, b-1]

        # (1) n(1 - x) increases across the window as a trend within the point
        # noise; guarded, the window also ends at or below the first maximum
        # of n(1 - x) within that noise (see _rising_within_noise)
        crit1 = _rising_within_noise(x, rouquerol, valid, fit, a, b,
                                     from_first_point=guard_multilayer)

        slope, intercept = fit["slope"], fit["intercept"]
        c = slope / intercept + 1.0
        monolayer = 1.0 / (slope + intercept)
        # n_m = 1 / (slope + intercept): by the delta method its variance is
        # n_m^4 var(slope + intercept), and var(slope + intercept) is the
        # variance of the fitted line at x = 1: s^2 (1/k + (1 - mean x)^2 / Sxx)
        k = fit["n"]
        s_line = np.sqrt(fit["sse"] / np.where(k > 2, k - 2, np.nan))
        monolayer_se = monolayer ** 2 * s_line * np.sqrt(1.0 / k + (1.0 - fit["mean_x"]) ** 2
                                                          / fit["sxx"])
        crit2 = (intercept > 0) & (monolayer > 0) & np.isfinite(c)
        x_mono = 1.0 / (np.sqrt(np.where(crit2, c, np.nan)) + 1.0)
        crit3 = (x[:, a] <= x_mono) & (x_mono <= x[:, b])
        x_read = _relative_pressure_at_loading(x, q, n_valid, monolayer)
        crit4 = np.abs(x_mono - x_read) <= BET_MONOLAYER_PRESSURE_TOLERANCE * x_read

        linear = fit["r2"] >= BET_MIN_R2
        if guard_multilayer:
            linear &= _no_bend_on_the_way_up(fit_below, x, y, a, b)
    linear &= inside
    crit1 &= inside

    accepted = linear & crit1 & crit2 & crit3 & crit4
    # lowest start first, then most points, then R^2 (each term below the previous step)
    start_rank = (m - a) * (m + 1.0) if guard_multilayer else 0.0
    score = np.where(accepted, start_rank + n_w + fit["r2"], -np.inf).reshape(g, -1)
    pick = np.argmax(score, axis=1)
    valid_row = np.isfinite(score[np.arange(g), pick])
    pa, pb = np.unravel_index(pick, (m, m))
    rows = np.arange(g)

    def at_pick(arr: np.ndarray) -> np.ndarray:
        return np.where(valid_row, arr.reshape(g, -1)[rows, pick], np.nan)

    held = np.stack([crit1, crit2, crit3, crit4], axis=-1) & linear[..., None]
    count = held.sum(axis=-1)
    diag_score = np.where(linear, count * (m + 1.0) + n_w, -np.inf).reshape(g, -1)
    diag_pick = np.where(valid_row, pick, np.argmax(diag_score, axis=1))
    any_linear = np.isfinite(diag_score[rows, diag_pick])
    held_flat = held.reshape(g, -1, 4)[rows, diag_pick]
    criteria = np.empty(g, dtype=object)
    for i in range(g):  # strings for the report only
        criteria[i] = (",".join(lbl for lbl, h in zip(CRITERIA_LABELS, held_flat[i]) if h)
                       if any_linear[i] else None)

    return {
        "valid": valid_row,
        "bet_c": at_pick(c),
        "bet_monolayer_mol_per_kg": at_pick(monolayer),
        "bet_monolayer_stderr_mol_per_kg": at_pick(monolayer_se),
        "bet_range_relative_pressure_low": np.where(valid_row, x[rows, pa], np.nan),
        "bet_range_relative_pressure_high": np.where(valid_row, x[rows, pb], np.nan),
        "bet_r2": at_pick(fit["r2"]),
        "bet_n_points": at_pick(np.broadcast_to(n_w, (g, m, m))),
        "bet_criteria": criteria,
    }


def _valid_points_first(relative_pressure: np.ndarray, loading: np.ndarray, mask: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Reorder each row so usable points (0 < x < 1, n > 0) come first, in pressure order."""
    with np.errstate(invalid="ignore"):
        valid = (mask & np.isfinite(relative_pressure) & np.isfinite(loading)
                 & (relative_pressure > 0) & (relative_pressure < 1) & (loading > 0))
    order = np.argsort(~valid, axis=1, kind="stable")
    x = np.take_along_axis(relative_pressure, order, axis=1)
    q = np.take_along_axis(loading, order, axis=1)
    valid = np.take_along_axis(valid, order, axis=1)
    # padding gets harmless values; every window touching it is excluded
    x = np.where(valid, x, 0.5)
    q = np.where(valid, q, 1.0)
    return x, q, valid, valid.sum(axis=1)


def _window_fits(x: np.ndarray, y: np.ndarray, valid: np.ndarray, a: np.ndarray, b: np.ndarray
                 ) -> dict[str, np.ndarray]:
    """Straight-line fits of y on x for every window [a, b] of every row: (g, m, m) arrays."""
    w = valid.astype(float)
    count = np.maximum(w.sum(axis=1, keepdims=True), 1.0)
    # centring keeps the prefix-sum differences free of cancellation
    x0 = (x * w).sum(axis=1, keepdims=True) / count
    y0 = (y * w).sum(axis=1, keepdims=True) / count
    xc, yc = np.where(valid, x - x0, 0.0), np.where(valid, y - y0, 0.0)

    def window_sum(v: np.ndarray) -> np.ndarray:
        prefix = np.concatenate([np.zeros((v.shape[0], 1)), np.cumsum(v, axis=1)], axis=1)
        return prefix[:, b + 1] - prefix[:, a]

    n = (b - a + 1).astype(float)[None]
    sx, sy = window_sum(xc), window_sum(yc)
    sxx = window_sum(xc * xc) - sx * sx / n
    sxy = window_sum(xc * yc) - sx * sy / n
    syy = window_sum(yc * yc) - sy * sy / n
    slope = sxy / sxx
    mean_x, mean_y = sx / n + x0[:, :, None], sy / n + y0[:, :, None]
    intercept = mean_y - slope * mean_x
    r2 = sxy * sxy / (sxx * syy)
    sse = np.maximum(syy - slope * sxy, 0.0)
    return {"slope": slope, "intercept": intercept, "r2": r2, "sse": sse, "sxx": sxx,
            "syy": syy, "mean_x": mean_x, "mean_y": mean_y, "n": np.broadcast_to(n, slope.shape)}


def _rising_within_noise(x: np.ndarray, rouquerol: np.ndarray, valid: np.ndarray,
                         bet_fit: dict[str, np.ndarray], a: np.ndarray, b: np.ndarray,
                         from_first_point: bool) -> np.ndarray:
    """Criterion 1 as a trend within the noise, for every window [a, b]: (g, m, m) bool.

    Two conditions, both needed:
      * the least-squares slope of n(1 - x) on x over the window is positive
        (the trend rises);
      * from the window's first point (``from_first_point``: from the
        isotherm's first point, so that the window also ends at or below the
        maximum of n(1 - x) within the noise) up to the window's end, no point
        lies below the highest earlier point by more than
        BET_RISE_NOISE_SIGMAS standard deviations of a difference of two
        points, sqrt(2) s_rel n(1 - x). s_rel, the relative point noise, comes
        from the residuals of the window's BET line: y = x / (n (1 - x)) has
        the relative noise of n (1 - x), so s_rel^2 = SSE / (k - 2) / mean(y^2).
    Point by point (every step up) the criterion fails on many noisy type I
    isotherms, where n(1 - x) is flat within the noise near its maximum.
    """
    g, m = rouquerol.shape
    with np.errstate(all="ignore"):
        r = np.where(valid, rouquerol, np.nan)
        trend = _window_fits(x, np.where(valid, r, 0.0), valid, a, b)["slope"] > 0
        k = bet_fit["n"]
        mean_y2 = bet_fit["syy"] / k + bet_fit["mean_y"] ** 2
        s_rel = np.sqrt(bet_fit["sse"] / np.where(k > 2, k - 2, np.nan) / mean_y2)
        allowed = BET_RISE_NOISE_SIGMAS * np.sqrt(2.0) * s_rel
        if from_first_point:
            running_max = np.maximum.accumulate(np.nan_to_num(r, nan=-np.inf), axis=1)
            drop = np.concatenate([np.full((g, 1), -np.inf),
                                   (running_max[:, :-1] - r[:, 1:]) / r[:, 1:]], axis=1)
            worst = np.fmax.accumulate(drop, axis=1)[:, None, :]       # up to b, from 0
            return trend & (worst <= allowed)
        r_end = np.broadcast_to(r[:, None, :], (g, m, m))
        running_max = np.maximum.accumulate(np.where(b >= a, r_end, -np.inf), axis=2)
        drop = (_shift_end(running_max) - r_end) / r_end
        worst = np.fmax.accumulate(np.where(b > a, drop, -np.inf), axis=2)
        return trend & (worst <= allowed)


def _shift_end(v: np.ndarray) -> np.ndarray:
    """Value of window [a, b-1] stored at [a, b]."""
    pad = np.full(v.shape[:2] + (1,), np.nan)
    return np.concatenate([pad, v[:, :, :-1]], axis=2)


def _no_bend_on_the_way_up(below: dict[str, np.ndarray], x: np.ndarray, y: np.ndarray,
                           a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """True where each point of the window, from the fourth on, lies within the
    prediction interval of the line through the window's points below it."""
    n_below = below["n"]
    dof = n_below - 2.0
    t = stdtrit(np.where(dof >= 1, dof, 1.0), 0.5 + BET_BEND_CONFIDENCE / 2.0)
    s = np.sqrt(below["sse"] / np.where(dof >= 1, dof, np.nan))
    xb, yb = x[:, b], y[:, b]
    predicted = below["intercept"] + below["slope"] * xb
    se = s * np.sqrt(1.0 + 1.0 / n_below + (xb - below["mean_x"]) ** 2 / below["sxx"])
    agrees = np.abs(yb - predicted) <= t * se + BET_BEND_RELATIVE_FLOOR * np.abs(yb)
    step_ok = np.where(n_below >= 3, agrees, True)
    return np.logical_and.accumulate(step_ok, axis=2)


def _relative_pressure_at_loading(x: np.ndarray, q: np.ndarray, n_valid: np.ndarray,
                                  target: np.ndarray) -> np.ndarray:
    """x (g, m, m) read by linear interpolation of the data at loading target (g, m, m).

    The data are made non-decreasing first (running maximum) so the reading is
    unique; nan where the target lies outside the measured loadings.
    """
    g, m = x.shape
    usable = np.arange(m)[None] < n_valid[:, None]
    q_up = np.maximum.accumulate(np.where(usable, q, -np.inf), axis=1)
    # one sorted key array for the whole block: row r lives in [4r, 4r + 2]
    scale = np.where(n_valid > 0, q_up[np.arange(g), np.maximum(n_valid - 1, 0)], 1.0)[:, None]
    keys = np.where(usable, q_up / scale, 2.0) + 4.0 * np.arange(g)[:, None]
    flat_target = target.reshape(g, -1)
    wanted = np.clip(np.nan_to_num(flat_target / scale, nan=1.5), -1.0, 1.5)
    below = (np.searchsorted(keys.ravel(), (wanted + 4.0 * np.arange(g)[:, None]).ravel())
             .reshape(g, -1) - m * np.arange(g)[:, None])
    hi = np.clip(below, 1, m - 1)
    lo = hi - 1
    rows = np.arange(g)[:, None]
    q_lo, q_hi = q_up[rows, lo], q_up[rows, hi]
    x_lo, x_hi = x[rows, lo], x[rows, hi]
    span = np.where(q_hi > q_lo, q_hi - q_lo, np.inf)
    x_at = x_lo + (flat_target - q_lo) * (x_hi - x_lo) / span
    inside = (below >= 1) & (below < n_valid[:, None]) & np.isfinite(flat_target)
    return np.where(inside, x_at, np.nan).reshape(target.shape)
