"""Isosteric heat of adsorption by Clausius-Clapeyron at constant loading.

For each sorbent and gas with usable adsorption-branch fits at two or more
temperatures (one group), the rules, stated once in docs/results.md:

* one model family for the whole group: among the models whose fit is
  eligible (converged, applies, off its bounds) at every temperature of the
  group, the one with the smallest criterion summed over the temperatures
  (the selection's criterion, AICc by default; the sum is the criterion of
  the independent per-temperature fits taken together). Ties: fewer
  parameters, then the model id. Mixing families across temperatures turns
  differences between model shapes into a spurious temperature dependence;
* loadings only where every temperature measured them: the grid spans the
  intersection of the measured loading ranges (and of the fitted loadings at
  the measured pressure ends, so every inverted pressure lies inside its
  isotherm's measured pressure range); nothing is extrapolated;
* each temperature's fit is inverted for p(n); the variance of ln p at a
  loading comes from the fit covariance by the delta method, and ln p is
  regressed on 1/T with those variances as weights: slope = -Qst / R. With
  two temperatures the standard error is the propagated one; with three or
  more it is inflated by the Birge ratio sqrt(chi2 / (k - 2)) when the
  points scatter more than their errors say;
* a value that is not positive, or above QST_UPPER_BOUND_J_PER_MOL, is
  withheld (nan) with the reason in ``qst_withheld`` and a flag.
"""
from __future__ import annotations

from typing import Any

import numpy as np
from scipy import constants

from ..interrupts import ends_job
from ..models import CATALOGUE, IsothermModel
from ..packing import Packed
from ..results import ModelFits, Selection
from .common import (SAME_TEMPERATURE_TOLERANCE_K, evaluate_model, invert_model,
                     max_measured_loading, measured_pressure_range, model_x,
                     note_internal_error, rows_by)

# The grid: QST_GRID_POINTS evenly over the loading range common to every
# temperature, ends included; the odd count puts the middle of the range (the
# reported single value, unless a reference loading is asked for) on the grid.
QST_GRID_POINTS = 11
# Clausius-Clapeyron assumes Qst does not change over the temperature span, so
# only isotherms within a window T_max <= ratio * T_min are combined; a 77 K
# BET isotherm is never paired with ambient ones (common practice, no single
# source for the exact ratio).
QST_MAX_TEMPERATURE_RATIO = 1.5
# Physisorption heats are a few times the heat of condensation (tens of
# kJ/mol); the strongest reversible chemisorbents screened for gas separation
# (amines for CO2) stay near 100 kJ/mol. A Clausius-Clapeyron value above
# 200 kJ/mol from isotherms is taken as an artefact of the fits (common
# practice, no single source).
QST_UPPER_BOUND_J_PER_MOL = 200_000.0
# Step in ln p for the numerical slope dq/dln p of the delta method: the
# central difference is then exact to ~1e-10 relative.
LN_PRESSURE_STEP = 1e-5
# Inverted pressures stay a hair inside the bracket so rounding at a measured
# end never turns a reachable loading into "not reached".
BRACKET_MARGIN = 1e-9

WITHHELD_INVERSION = "inversion_failed"
WITHHELD_NOT_POSITIVE = "not_positive"
WITHHELD_ABOVE_BOUND = "above_bound"


def isosteric_groups(packed: Packed, usable: np.ndarray) -> list[tuple[str, str, np.ndarray]]:
    """(sorbent_id, adsorbate, rows) with usable adsorption fits at >= 2 temperatures."""
    adsorption = np.array([b == "adsorption" for b in packed.branches], dtype=bool)
    keep = usable & adsorption
    groups = rows_by(list(zip(packed.sorbent_ids, packed.adsorbates)), np.flatnonzero(keep))
    out: list[tuple[str, str, np.ndarray]] = []
    for (sorbent_id, adsorbate), members in sorted(groups.items()):
        rows = _temperature_window(np.array(members), packed.temperature_k)
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


def common_model_family(fits: dict[str, ModelFits], selection: Selection,
                        rows: np.ndarray) -> str | None:
    """The model id with the smallest summed criterion among models eligible at every row."""
    candidates = []
    for model_id in selection.model_ids:
        if model_id not in fits or model_id not in CATALOGUE:
            continue
        model_fits = fits[model_id]
        criterion = getattr(model_fits, selection.criterion)[rows]
        excluded = selection.excluded.get(model_id)
        eligible = np.all(np.isfinite(model_fits.params[rows]), axis=1) & np.isfinite(criterion)
        if excluded is not None:
            eligible &= excluded[rows] == ""
        if np.all(eligible):
            candidates.append((float(np.sum(criterion)), model_fits.n_params, model_id))
    return min(candidates)[2] if candidates else None


def common_loading_range(packed: Packed, model: type[IsothermModel], model_fits: ModelFits, rows: np.ndarray
                         ) -> tuple[float, float, np.ndarray, np.ndarray]:
    """(low, high) loading in mol/kg every temperature covers, and each row's pressure bracket.

    A loading counts as covered at a temperature when it lies inside both
    the measured loadings and the fit's loadings at the measured pressure
    ends; the bracket (each (rows,)) is the measured pressure range.
    """
    p_low, p_high = measured_pressure_range(packed)
    p_low, p_high = p_low[rows], p_high[rows]
    if model.relative_pressure:
        p_high = np.minimum(p_high, packed.saturation_pressure_pa[rows] * (1.0 - BRACKET_MARGIN))
    q_measured_min = np.min(np.where(packed.mask[rows], packed.loading_mol_per_kg[rows], np.inf),
                            axis=1)
    q_measured_max = max_measured_loading(packed)[rows]
    q_fit_ends = evaluate_model(model, model_fits.params[rows], packed.temperature_k[rows],
                                packed.saturation_pressure_pa[rows],
                                np.stack([p_low, p_high], axis=1))
    low = float(np.max(np.maximum(q_measured_min, q_fit_ends[:, 0])))
    high = float(np.min(np.minimum(q_measured_max, q_fit_ends[:, 1])))
    return low, high, p_low * (1.0 - BRACKET_MARGIN), p_high * (1.0 + BRACKET_MARGIN)


def ln_pressure_variance(model: type[IsothermModel], params: np.ndarray, covariance: np.ndarray,
                         temperature_k: np.ndarray, saturation_pressure_pa: np.ndarray,
                         pressure_pa: np.ndarray) -> np.ndarray:
    """Variance (g, G) of ln p(n) from the fit covariance (g, k, k), by the delta method.

    At fixed loading, d ln p / d theta_j = -(dq/d theta_j) / (dq/d ln p); the
    parameter jacobian is the model's own, dq/d ln p a central difference.
    nan where the covariance or the slope is not finite.
    """
    x = model_x(model, pressure_pa, saturation_pressure_pa)
    columns = [params[:, j:j + 1] for j in range(params.shape[1])]
    t = temperature_k[:, None]
    with np.errstate(all="ignore"):
        try:
            jac = np.stack([np.broadcast_to(d, x.shape) for d in model.jacobian(x, t, *columns)],
                           axis=-1)
            up = model.evaluate(x * np.exp(LN_PRESSURE_STEP), t, *columns)
            down = model.evaluate(x * np.exp(-LN_PRESSURE_STEP), t, *columns)
        except Exception as exc:  # a model bug must not take the batch down
            if ends_job(exc):
                raise
            note_internal_error(model, exc, "isosteric heat")
            return np.full(pressure_pa.shape, np.nan)
        slope = (up - down) / (2.0 * LN_PRESSURE_STEP)
        gradient = -jac / slope[..., None]
        variance = np.einsum("gai,gij,gaj->ga", gradient, covariance, gradient)
    return np.where(np.isfinite(variance) & (slope > 0), np.maximum(variance, 0.0), np.nan)


def isosteric_heat_rows(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                        usable: np.ndarray,
                        reference_loading_mol_per_kg: float | None = None) -> list[dict]:
    """One row per sorbent and gas measured at >= 2 temperatures (rules: module docstring).

    ``reference_loading_mol_per_kg`` sets where the single reported value is
    taken; by default the middle of the common loading range.
    """
    out = []
    for sorbent_id, adsorbate, rows in isosteric_groups(packed, usable):
        row = {
            "sorbent_id": sorbent_id,
            "adsorbate": adsorbate,
            "kind": "isosteric_heat",
            "isotherm_ids": [packed.isotherm_ids[i] for i in rows],
            "temperatures_k": [float(t) for t in packed.temperature_k[rows]],
            "method": "two_point" if rows.size == 2 else "regression",
        }
        row.update(_group_heats(packed, fits, selection, rows, reference_loading_mol_per_kg))
        out.append(row)
    return out


def _group_heats(packed: Packed, fits: dict[str, ModelFits], selection: Selection, rows: np.ndarray,
                 reference_loading_mol_per_kg: float | None) -> dict[str, Any]:
    flags: list[str] = []
    result: dict[str, Any] = {"qst_model": None, "reference_loading_mol_per_kg": float("nan"),
              "isosteric_heat_j_per_mol": float("nan"),
              "isosteric_heat_stderr_j_per_mol": float("nan"),
              "qst_loading_mol_per_kg": [], "qst_j_per_mol": [], "qst_stderr_j_per_mol": [],
              "qst_withheld": [], "flags": flags}
    model_id = common_model_family(fits, selection, rows)
    if model_id is None:
        flags.append("qst_no_common_model")
        return result
    result["qst_model"] = model_id
    model, model_fits = CATALOGUE[model_id], fits[model_id]
    low, high, p_low, p_high = common_loading_range(packed, model, model_fits, rows)
    if not (np.isfinite(low) and np.isfinite(high) and low < high):
        flags.append("qst_no_common_loading_range")
        return result

    grid = np.linspace(low, high, QST_GRID_POINTS)
    reference = grid[QST_GRID_POINTS // 2]
    if reference_loading_mol_per_kg is not None:
        reference = float(reference_loading_mol_per_kg)
        if not low <= reference <= high:
            flags.append("qst_reference_outside_measured_range")
    loadings = np.append(grid, reference)   # the reference rides along as a last column
    wanted = np.broadcast_to(loadings, (rows.size, loadings.size)).copy()
    params, temperature_k = model_fits.params[rows], packed.temperature_k[rows]
    p0 = packed.saturation_pressure_pa[rows]
    pressure = invert_model(model, params, temperature_k, p0, wanted, p_low, p_high)
    variance = ln_pressure_variance(model, params, model_fits.covariance[rows], temperature_k,
                                    p0, pressure)
    with np.errstate(divide="ignore", invalid="ignore"):
        qst, stderr = clausius_clapeyron(temperature_k, pressure, variance)
    withheld = np.full(qst.shape, "", dtype=object)
    withheld[~np.isfinite(qst)] = WITHHELD_INVERSION
    with np.errstate(invalid="ignore"):
        withheld[np.isfinite(qst) & (qst <= 0)] = WITHHELD_NOT_POSITIVE
        withheld[qst > QST_UPPER_BOUND_J_PER_MOL] = WITHHELD_ABOVE_BOUND
    if "qst_reference_outside_measured_range" in flags:
        withheld[-1] = "reference_outside_measured_range"
    for reason, flag in ((WITHHELD_INVERSION, "qst_inversion_failed"),
                         (WITHHELD_NOT_POSITIVE, "qst_not_positive"),
                         (WITHHELD_ABOVE_BOUND, "qst_above_bound")):
        if np.any(withheld == reason):
            flags.append(flag)
    shown = withheld == ""
    qst, stderr = np.where(shown, qst, np.nan), np.where(shown, stderr, np.nan)
    if np.any(shown & ~np.isfinite(stderr)):
        flags.append("qst_no_standard_error")
    result.update({
        "reference_loading_mol_per_kg": reference,
        "isosteric_heat_j_per_mol": float(qst[-1]),
        "isosteric_heat_stderr_j_per_mol": float(stderr[-1]),
        "qst_loading_mol_per_kg": [float(v) for v in grid],
        "qst_j_per_mol": [float(v) for v in qst[:-1]],
        "qst_stderr_j_per_mol": [float(v) for v in stderr[:-1]],
        "qst_withheld": [str(v) for v in withheld[:-1]],
    })
    return result


def clausius_clapeyron(temperature_k: np.ndarray, pressure_pa: np.ndarray,
                       ln_pressure_variance: np.ndarray | None = None
                       ) -> tuple[np.ndarray, np.ndarray]:
    """Qst and its standard error in J/mol, each (G,), from pressures (k, G) at k temperatures.

    ln p is regressed on 1/T at each grid loading, weighted by 1 / variance of
    ln p where every variance (k, G) is positive; the slope's standard error
    is the propagated one, inflated by the Birge ratio sqrt(chi2 / (k - 2))
    when k >= 3 and the points scatter more than their variances say. Where a
    variance is zero (exact fits) the regression is unweighted and the error
    the larger of the propagated one and the residual one (k - 2 degrees of
    freedom). Without variances the propagated part is nan for k = 2.
    """
    inv_t = 1.0 / np.asarray(temperature_k, dtype=float)[:, None]
    ln_p = np.log(pressure_pa)
    k = inv_t.shape[0]
    if ln_pressure_variance is None:
        ln_pressure_variance = np.zeros_like(ln_p) if k >= 3 else np.full_like(ln_p, np.nan)
    variance = np.asarray(ln_pressure_variance, dtype=float)
    weighted = np.all(np.isfinite(variance) & (variance > 0), axis=0)
    weight = np.where(weighted, 1.0 / np.where(weighted, variance, 1.0), 1.0)

    def mean(values: np.ndarray) -> np.ndarray:
        return np.sum(weight * values, axis=0) / np.sum(weight, axis=0)

    dx = inv_t - mean(inv_t)
    sxx = np.sum(weight * dx * dx, axis=0)
    slope = np.sum(weight * dx * (ln_p - mean(ln_p)), axis=0) / sxx
    residual = ln_p - mean(ln_p) - slope * dx
    chi2 = np.sum(weight * residual ** 2, axis=0)
    dof = k - 2
    # weighted: 1/sqrt(sum w dx^2); unweighted: sqrt(sum dx^2 var) / sum dx^2
    propagated = np.where(weighted, 1.0 / np.sqrt(sxx),
                          np.sqrt(np.sum(dx * dx * variance, axis=0)) / sxx)
    if dof >= 1:
        scatter = np.sqrt(chi2 / dof)
        slope_se = np.where(weighted, propagated * np.maximum(1.0, scatter),
                            np.fmax(propagated, scatter / np.sqrt(sxx)))
    else:
        slope_se = propagated
    return -constants.R * slope, constants.R * slope_se
