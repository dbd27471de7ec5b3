"""Henry constant with its support: the selected model's slope at p -> 0 where
the data reach its Henry region, else a virial fit of the lowest points.

The rules (stated once in docs/results.md, "Henry constant"):

* Henry region test: how far the estimate's own curve bends between p -> 0
  and the lowest measured pressure p1, as the ratio E = K_H p1 / q(p1) (the
  limit over the chord slope at p1; for the virial line E = exp(A1 q1)). The
  lowest point lies inside the Henry region when E is within a factor
  HENRY_REGION_TOLERANCE of 1. For Langmuir E = 1 + b p1, so the test asks
  for a lowest point below about 9 % of the capacity. The curve, not the
  measured q1, is used: at the lowest loadings the noise is largest.
* The selected model's limit is supported when it is finite and positive and,
  for a model whose p -> 0 shape is set by a fitted exponent
  (``henry_slope_from_exponent`` on the model class), passes the test: a rise of the slope below the
  lowest point would come from an exponent the data never constrained there.
  Langmuir-shaped limits (Langmuir, dual-site Langmuir, BET, GAB, Henry) keep
  their extrapolation (the curvature is the one the data were fitted with)
  but are flagged. A supported limit is reported with its delta-method
  standard error.
* A diverging limit (an exponent below 1 at p -> 0: Sips, Freundlich,
  Dubinin-Astakhov) is reported as inf, flagged ``henry_diverges``.
* Otherwise the virial estimate is reported (``henry_from_virial``), with the
  standard error of its line's intercept.
* ``lowest_point_outside_henry_region`` when the reported estimate (or, for a
  diverging limit, the virial one) fails the test: the figure is an
  extrapolation beyond the data.
"""
from __future__ import annotations

import numpy as np

from ..interrupts import ends_job
from ..models import CATALOGUE, IsothermModel
from ..models.linear import masked_linear_fit
from ..packing import Packed
from ..results import ModelFits, Selection
from .averaging import central_difference_gradient, delta_method_variance
from .common import (add_flag, max_measured_loading, note_internal_error, positive_interval_95,
                     selected_groups, selected_loading)

# Virial fall-back: ln(p/q) = -ln K_H + A1 q + ...; the line is fitted to the
# points whose loading is at most this fraction of the highest measured
# loading (and always to the lowest VIRIAL_MIN_POINTS points), where the
# neglected quadratic term biases K_H by about fraction^2 / 12 for Langmuir data.
VIRIAL_MAX_LOADING_FRACTION = 0.25
VIRIAL_MIN_POINTS = 3

# The slope may rise by at most this factor below the lowest measured point
# for that point to count as inside the Henry region: 10 % is a bend the data
# show plainly at 1-2 % loading noise, and a small share of the figure to
# leave to the curve's form (the Henry region has no single numeric bound in
# the literature; this value is our choice).
HENRY_REGION_TOLERANCE = 1.10

def model_henry_constant(packed: Packed, fits: dict[str, ModelFits],
                         selection: Selection) -> np.ndarray:
    """(n,) dq/dp at p -> 0 of the selected model in mol/kg/Pa; inf where it
    diverges, 0 where it vanishes, nan where undefined."""
    return _model_henry_and_stderr(packed, fits, selection)[0]


def _model_henry_and_stderr(packed: Packed, fits: dict[str, ModelFits], selection: Selection
                            ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(K_H, its delta-method standard error, degrees of freedom), each (n,)."""
    k_h = np.full(packed.n, np.nan)
    stderr = np.full(packed.n, np.nan)
    dof = np.full(packed.n, np.nan)
    for model, model_fits, rows in selected_groups(selection, fits):
        params = model_fits.params[rows]
        temperature_k = packed.temperature_k[rows]
        p0 = packed.saturation_pressure_pa[rows]
        value = _limit(model, params, temperature_k, p0, rows)
        if value is None:
            continue
        k_h[rows] = value
        stderr[rows] = _delta_method_stderr(model, params, model_fits.covariance[rows],
                                            temperature_k, p0, value, rows)
        if model_fits.n_points.size == model_fits.n:
            dof[rows] = model_fits.n_points[rows] - model_fits.n_params
    return k_h, stderr, dof


def _limit(model: type[IsothermModel], params: np.ndarray, temperature_k: np.ndarray,
           saturation_pressure_pa: np.ndarray, rows: np.ndarray) -> np.ndarray | None:
    """K_H (len(rows),) of ``model`` for the packed ``rows``; None if undefined."""
    shape = rows.shape
    try:
        with np.errstate(all="ignore"):
            value = model.henry_constant(params, temperature_k, saturation_pressure_pa)
    except Exception as exc:  # a model bug gives nan, not a failed batch
        if ends_job(exc):
            raise
        note_internal_error(model, exc, "henry_constant", rows)
        return np.full(shape, np.nan)
    if value is None:
        return None
    return np.broadcast_to(np.asarray(value, dtype=float), shape).copy()


def _delta_method_stderr(model: type[IsothermModel], params: np.ndarray, covariance: np.ndarray,
                         temperature_k: np.ndarray, saturation_pressure_pa: np.ndarray,
                         value: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """sqrt(g' C g) with g = dK_H/dparams; nan where K_H is not finite and
    positive or the covariance is missing."""
    gradient = central_difference_gradient(
        lambda trial: _limit(model, trial, temperature_k, saturation_pressure_pa, rows),
        params)
    variance = delta_method_variance(gradient, covariance)
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(value) & (value > 0) & np.isfinite(variance)
        return np.where(ok, np.sqrt(np.where(ok, variance, 0.0)), np.nan)


def virial_henry_constant(packed: Packed) -> tuple[np.ndarray, np.ndarray]:
    """(K_H in mol/kg/Pa, points used), each (n,), from ln(p/q) linear in q at low loading."""
    k_h, _, n_used, _ = virial_henry_fit(packed)
    return k_h, n_used


def virial_henry_fit(packed: Packed) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(K_H in mol/kg/Pa, its standard error, points used, slope A1 in kg/mol), each (n,).

    K_H = exp(-intercept) of the line ln(p/q) = intercept + A1 q; its standard
    error is K_H times the intercept's (delta method), with the line's
    residual variance on n_used - 2 degrees of freedom.
    """
    p, q = packed.pressure_pa, packed.loading_mol_per_kg
    usable = packed.mask & (p > 0) & (q > 0)
    rank = np.cumsum(usable, axis=1) - 1
    q_max = max_measured_loading(packed)[:, None]
    low = usable & ((q <= VIRIAL_MAX_LOADING_FRACTION * q_max) | (rank < VIRIAL_MIN_POINTS))
    with np.errstate(divide="ignore", invalid="ignore"):
        ln_p_over_q = np.log(np.where(low, p / np.where(low, q, 1.0), 1.0))
    slope, intercept, n_used = masked_linear_fit(q, ln_p_over_q, low)
    residual = np.where(low, ln_p_over_q - (intercept[:, None] + slope[:, None] * q), 0.0)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        mean_q = np.sum(np.where(low, q, 0.0), axis=1) / n_used
        sxx = np.sum(np.where(low, (q - mean_q[:, None]) ** 2, 0.0), axis=1)
        variance = np.sum(residual**2, axis=1) / (n_used - 2.0)
        intercept_se = np.sqrt(variance * (1.0 / n_used + mean_q**2 / sxx))
        k_h = np.exp(-intercept)  # an absurd intercept gives inf: not finite, so unused
    enough = (n_used >= VIRIAL_MIN_POINTS) & np.isfinite(k_h)
    return (np.where(enough, k_h, np.nan), np.where(enough, k_h * intercept_se, np.nan), n_used,
            np.where(enough, slope, np.nan))


def lowest_point(packed: Packed) -> tuple[np.ndarray, np.ndarray]:
    """(p1 in Pa, q1 in mol/kg), each (n,): the lowest pressure with a positive
    loading and the mean loading there (replicates averaged); nan where none."""
    p, q = packed.pressure_pa, packed.loading_mol_per_kg
    usable = packed.mask & (p > 0) & (q > 0)
    p_low = np.min(np.where(usable, p, np.inf), axis=1)
    at_low = usable & (p == p_low[:, None])
    count = at_low.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean_q = np.sum(np.where(at_low, q, 0.0), axis=1) / count
    return np.where(count > 0, p_low, np.nan), np.where(count > 0, mean_q, np.nan)


def bend_ratio(k_h: np.ndarray, pressure_pa: np.ndarray, loading_mol_per_kg: np.ndarray
               ) -> np.ndarray:
    """(n,) K_H p / q: 1 inside the Henry region; nan where K_H is not finite and positive."""
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = k_h * pressure_pa / loading_mol_per_kg
        return np.where(np.isfinite(k_h) & (k_h > 0) & (loading_mol_per_kg > 0), ratio, np.nan)


def in_henry_region(ratio: np.ndarray) -> np.ndarray:
    """(n,) bool: a bend_ratio within HENRY_REGION_TOLERANCE of 1."""
    with np.errstate(invalid="ignore"):
        return (ratio <= HENRY_REGION_TOLERANCE) & (ratio >= 1.0 / HENRY_REGION_TOLERANCE)


def henry_columns(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                  flags: list[list[str]]) -> dict[str, np.ndarray]:
    from_model, model_se, model_dof = _model_henry_and_stderr(packed, fits, selection)
    virial, virial_se, virial_used, virial_slope = virial_henry_fit(packed)
    p1, q1 = lowest_point(packed)
    model_q1 = selected_loading(packed, fits, selection,
                                np.where(np.isfinite(p1), p1, 1.0)[:, None])[:, 0]
    model_bend = bend_ratio(from_model, p1, model_q1)
    with np.errstate(over="ignore", invalid="ignore"):
        virial_bend = np.where(np.isfinite(virial), np.exp(virial_slope * q1), np.nan)
        diverges = from_model == np.inf
        exponent_shaped = np.isin(np.asarray(selection.best, dtype=object),
                                  [m for m, model in CATALOGUE.items()
                                   if model.henry_slope_from_exponent])
        model_ok = np.isfinite(from_model) & (from_model > 0) & (
            in_henry_region(model_bend) | ~exponent_shaped)
        virial_ok = np.isfinite(virial) & (virial > 0)
    use_virial = ~model_ok & ~diverges & virial_ok
    henry = np.where(diverges, np.inf, np.where(model_ok, from_model,
                                                np.where(use_virial, virial, np.nan)))
    stderr = np.where(model_ok, model_se, np.where(use_virial, virial_se, np.nan))
    dof = np.where(model_ok, model_dof, np.where(use_virial, virial_used - 2.0, np.nan))
    low, high = positive_interval_95(henry, stderr, dof)
    source = np.full(packed.n, None, dtype=object)
    source[model_ok | diverges] = "model"
    source[use_virial] = "virial"
    # the bend of the reported figure, or of the data's own (virial) one where
    # the reported limit is infinite
    bend = np.where(model_ok, model_bend, np.where(use_virial | diverges, virial_bend, np.nan))
    outside = np.isfinite(bend) & ~in_henry_region(bend)
    add_flag(flags, diverges, "henry_diverges")
    add_flag(flags, use_virial, "henry_from_virial")
    add_flag(flags, outside, "lowest_point_outside_henry_region")
    add_flag(flags, ~model_ok & ~diverges & ~virial_ok, "henry_undetermined")
    return {
        "henry_mol_per_kg_pa": henry,
        "henry_source": source,
        "henry_stderr_mol_per_kg_pa": stderr,
        "henry_ci95_low_mol_per_kg_pa": low,
        "henry_ci95_high_mol_per_kg_pa": high,
        "henry_model_mol_per_kg_pa": from_model,
        "henry_virial_mol_per_kg_pa": virial,
        "henry_bend_at_lowest_point": bend,
    }
