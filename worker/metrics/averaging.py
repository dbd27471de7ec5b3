"""Model-averaged figures: q_sat, Henry constant and the loadings at the batch's
conditions averaged over the eligible models by Akaike weight.

Burnham & Anderson (2002), Model Selection and Multimodel Inference, 2nd ed.:

* the averaged figure is theta_bar = sum_i w_i theta_i (their eq. 4.1), with
  the Akaike weights w_i of the selection renormalised over the models that
  take part in that figure;
* its unconditional standard error is their eq. 4.9,
  se(theta_bar) = sum_i w_i sqrt(var_i + (theta_i - theta_bar)^2),
  which adds to each model's own sampling variance the spread of the models'
  estimates around the average (model-selection uncertainty). Eq. 4.9, not
  the revised form of their section 6.3 (eq. 6.12, var = sum_i w_i (var_i +
  (theta_i - theta_bar)^2)): it is the form the book uses throughout its
  examples, and 6.12 is never smaller (Cauchy-Schwarz), so 4.9 is the less
  conservative of the two;
* the 95 % interval uses their small-sample adjustment (section 4.3.3, from
  memory): each model's variance is scaled by (t_{df_i} / z)^2, with df_i =
  n - p_i of that model's fit, before the sum, and the interval is the normal
  one on the adjusted error. Built on ln(theta_bar) by
  ``positive_interval_95`` (z = the t quantile at infinite df), so it never
  goes below zero; with a single model it is that model's own Student-t
  interval, exactly.

Per-model variances are the delta method on each fit's covariance, gradients
by central differences (as the capacity module does), so any catalogue model
takes part without an analytic derivative.

Which models take part, per isotherm and figure: the eligible models (no
exclusion reason, a positive Akaike weight) whose figure is finite; for q_sat
only those that define a saturation capacity. A model whose figure is nan or
infinite (a diverging Henry limit, a p/p0 model beyond p0, a negative
predicted loading) is left out and the weights are renormalised over the
rest; ``model_average_partial`` says when the models left out so carried more
than MODEL_AVERAGE_LEFT_OUT_WEIGHT of the Akaike weight.
"""
from __future__ import annotations

from typing import Callable

import numpy as np

from ..interrupts import ends_job
from ..isotherm import Batch
from ..models import CATALOGUE, IsothermModel
from ..packing import Packed
from ..results import ModelFits, Selection
from .capacity import saturation_capacity_gradient
from .common import (add_flag, evaluate_model, note_internal_error, positive_interval_95,
                     pressure_label, t_quantile_975)

# An averaged figure that had to leave out models holding more than this share
# of the Akaike weight (their figure not finite) is flagged: the average then
# speaks for part of the model set only. 1 % is a screening choice, no source.
MODEL_AVERAGE_LEFT_OUT_WEIGHT = 0.01


def akaike_average(weights: np.ndarray, values: np.ndarray, variances: np.ndarray,
                   dof: np.ndarray) -> dict[str, np.ndarray]:
    """Average over models (last axis) of ``values`` with Akaike ``weights``.

    All inputs (n, m): weights as selected (0 = not taking part), each model's
    figure, its sampling variance and its residual degrees of freedom. Models
    whose figure is not finite are left out and the weights renormalised.
    Returns (n,) arrays: ``value`` (eq. 4.1), ``stderr`` (eq. 4.9),
    ``stderr_adjusted`` (t-adjusted, for the interval), ``weight_share`` (the
    selected weight of the models that took part) and ``left_out_weight``
    (the weight of eligible models left out because their figure is not finite).
    """
    weights = np.where(np.isfinite(weights) & (weights > 0), weights, 0.0)
    with np.errstate(invalid="ignore"):
        takes_part = (weights > 0) & np.isfinite(values)
    share = np.sum(np.where(takes_part, weights, 0.0), axis=-1)
    left_out = np.sum(np.where(takes_part, 0.0, weights), axis=-1)
    has_any = share > 0
    w = np.where(takes_part, weights, 0.0) / np.where(has_any, share, 1.0)[..., None]
    theta = np.where(takes_part, values, 0.0)
    mean = np.sum(w * theta, axis=-1)
    spread2 = (theta - mean[..., None]) ** 2
    z = t_quantile_975(np.inf)
    with np.errstate(invalid="ignore"):
        t_over_z2 = (t_quantile_975(dof) / z) ** 2
        var = np.where(takes_part, variances, 0.0)
        ok_var = np.where(takes_part, np.isfinite(var) & (var >= 0), True)
        var = np.where(ok_var, var, np.nan)
        stderr = np.sum(w * np.sqrt(var + spread2), axis=-1)
        stderr_adjusted = np.sum(
            w * np.sqrt(np.where(takes_part, t_over_z2, 1.0) * var + spread2), axis=-1)
    return {
        "value": np.where(has_any, mean, np.nan),
        "stderr": np.where(has_any, stderr, np.nan),
        "stderr_adjusted": np.where(has_any, stderr_adjusted, np.nan),
        "weight_share": share,
        "left_out_weight": left_out,
    }


def central_difference_gradient(figure: Callable[[np.ndarray], np.ndarray | None],
                                params: np.ndarray) -> np.ndarray:
    """d figure / d params by central differences: (g, ..., k) for params (g, k).

    ``figure`` maps params (g, k) to an array (g, ...), or None where the
    figure is undefined there (the gradient is nan). Same relative step as
    the capacity module's saturation-capacity gradient.
    """
    g, k = params.shape
    columns = []
    for j in range(k):
        step = 1e-6 * np.maximum(np.abs(params[:, j]), 1e-12)
        up, down = params.copy(), params.copy()
        up[:, j] += step
        down[:, j] -= step
        with np.errstate(all="ignore"):
            diff = np.asarray(figure(up), dtype=float) - np.asarray(figure(down), dtype=float)
            step = step.reshape((g,) + (1,) * (diff.ndim - 1))
            columns.append(diff / (2 * step))
    return np.stack(columns, axis=-1)


def delta_method_variance(gradient: np.ndarray, covariance: np.ndarray) -> np.ndarray:
    """grad' C grad for gradients (g, ..., k) and covariances (g, k, k); nan where negative."""
    g, k = covariance.shape[0], covariance.shape[-1]
    flat = gradient.reshape(g, -1, k)
    with np.errstate(invalid="ignore"):
        var = np.einsum("gmi,gij,gmj->gm", flat, covariance, flat).reshape(gradient.shape[:-1])
        return np.where(var >= 0, var, np.nan)


def _eligible_weights(selection: Selection, fits: dict[str, ModelFits],
                      model_filter: Callable[[type[IsothermModel]], bool] = lambda model: True
                      ) -> list[tuple[int, type[IsothermModel], ModelFits, np.ndarray]]:
    """(column, model class, fits, rows) for every model that may take part, with the
    rows (indices) where it is eligible, has a positive weight and finite parameters."""
    out = []
    n = selection.best.shape[0]
    for j, model_id in enumerate(selection.model_ids):
        if model_id not in CATALOGUE or model_id not in fits or not model_filter(CATALOGUE[model_id]):
            continue
        model_fits = fits[model_id]
        eligible = selection.excluded.get(model_id, np.full(n, "", dtype=object)) == ""
        weight = selection.weights[:, j]
        with np.errstate(invalid="ignore"):
            ok = (eligible & np.isfinite(weight) & (weight > 0)
                  & np.all(np.isfinite(model_fits.params), axis=1))
        rows = np.flatnonzero(ok)
        if rows.size:
            out.append((j, CATALOGUE[model_id], model_fits, rows))
    return out


def _residual_dof(model_fits: ModelFits, rows: np.ndarray) -> np.ndarray:
    if model_fits.n_points.shape[0] != model_fits.n:
        return np.full(rows.shape, np.nan)
    return (model_fits.n_points[rows] - model_fits.n_params).astype(float)


def _positive(values: np.ndarray | None, allow_zero: bool = False) -> np.ndarray:
    """Values where they are a physical figure (finite, > 0 or >= 0), nan elsewhere
    (None, no figure at all, is one nan)."""
    values = np.asarray(values, dtype=float)
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(values) & ((values >= 0) if allow_zero else (values > 0))
    return np.where(ok, values, np.nan)


def _averaged_figure(selection: Selection, fits: dict[str, ModelFits], shape: tuple[int, ...],
                     per_model: Callable[[type[IsothermModel], ModelFits, np.ndarray],
                                         tuple[np.ndarray, np.ndarray]],
                     model_filter: Callable[[type[IsothermModel]], bool] = lambda model: True
                     ) -> dict[str, np.ndarray]:
    """Akaike average of a figure of shape (n, *shape) that ``per_model`` gives as
    (values, variances) of shape (len(rows), *shape) for a model's eligible rows."""
    n, m = selection.best.shape[0], len(selection.model_ids)
    weights = np.zeros((n, *shape, m))
    values = np.full((n, *shape, m), np.nan)
    variances = np.full((n, *shape, m), np.nan)
    dof = np.full((n, *shape, m), np.nan)
    extra = (1,) * len(shape)
    for j, model, model_fits, rows in _eligible_weights(selection, fits, model_filter):
        try:
            value, variance = per_model(model, model_fits, rows)
        except Exception as exc:  # a model bug leaves that model out, not the batch
            if ends_job(exc):
                raise
            note_internal_error(model, exc, "model averaging", rows)
            continue
        weights[rows, ..., j] = selection.weights[rows, j].reshape(-1, *extra)
        values[rows, ..., j] = value
        variances[rows, ..., j] = variance
        dof[rows, ..., j] = _residual_dof(model_fits, rows).reshape(-1, *extra)
    return akaike_average(weights, values, variances, dof)


def averaged_q_sat(packed: Packed, fits: dict[str, ModelFits],
                   selection: Selection) -> dict[str, np.ndarray]:
    """Akaike average of q_sat (mol/kg) over the eligible models that define one."""
    def per_model(model: type[IsothermModel], model_fits: ModelFits, rows: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray]:
        params = model_fits.params[rows]
        with np.errstate(all="ignore"):
            value = _positive(model.saturation_capacity(params))
        gradient = saturation_capacity_gradient(model, params)
        return value, delta_method_variance(gradient, model_fits.covariance[rows])

    return _averaged_figure(selection, fits, (), per_model,
                            lambda model: model.defines_saturation_capacity())


def averaged_henry(packed: Packed, fits: dict[str, ModelFits],
                   selection: Selection) -> dict[str, np.ndarray]:
    """Akaike average of the models' p -> 0 slopes (mol/kg/Pa); a model without a
    finite positive limit (none defined, or diverging) is left out."""
    def per_model(model: type[IsothermModel], model_fits: ModelFits, rows: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray]:
        temperature_k = packed.temperature_k[rows]
        p0 = packed.saturation_pressure_pa[rows]

        def henry(params: np.ndarray) -> np.ndarray:
            k_h = model.henry_constant(params, temperature_k, p0)
            if k_h is None:
                return np.full(params.shape[0], np.nan)
            return np.broadcast_to(np.asarray(k_h, dtype=float), (params.shape[0],))

        params = model_fits.params[rows]
        with np.errstate(all="ignore"):
            value = _positive(henry(params))
        gradient = central_difference_gradient(henry, params)
        return value, delta_method_variance(gradient, model_fits.covariance[rows])

    return _averaged_figure(selection, fits, (), per_model)


def averaged_loadings(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                      pressure_pa: np.ndarray, swing_pairs: tuple[int, int] | None = None
                      ) -> dict[str, np.ndarray]:
    """Akaike average of the loadings (n, k) in mol/kg at ``pressure_pa`` (n, k),
    each isotherm at its own temperature. A negative or nan predicted loading
    leaves that model out at that pressure. With ``swing_pairs`` = (a, d) a
    (k+1)-th column holds the average of each model's q(p_a) - q(p_d)."""
    k = pressure_pa.shape[1]

    def per_model(model: type[IsothermModel], model_fits: ModelFits, rows: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray]:
        temperature_k = packed.temperature_k[rows]
        p0 = packed.saturation_pressure_pa[rows]
        pressure = pressure_pa[rows]

        def loading(params: np.ndarray) -> np.ndarray:
            q = evaluate_model(model, params, temperature_k, p0, pressure)
            if swing_pairs is not None:
                a, d = swing_pairs
                q = np.concatenate([q, q[:, a:a + 1] - q[:, d:d + 1]], axis=1)
            return q

        params = model_fits.params[rows]
        value = loading(params)
        physical = _positive(value[:, :k], allow_zero=True)
        if swing_pairs is not None:
            a, d = swing_pairs
            swing = np.where(np.isfinite(physical[:, a]) & np.isfinite(physical[:, d]),
                             value[:, k], np.nan)
            physical = np.concatenate([physical, swing[:, None]], axis=1)
        gradient = central_difference_gradient(loading, params)
        return physical, delta_method_variance(gradient, model_fits.covariance[rows])

    width = k + (1 if swing_pairs is not None else 0)
    return _averaged_figure(selection, fits, (width,), per_model)


def _figure_columns(name: str, unit: str, average: dict[str, np.ndarray],
                    index: int | None = None) -> dict[str, np.ndarray]:
    """The averaged value, its eq. 4.9 standard error and positive 95 % interval."""
    def part(key: str) -> np.ndarray:
        return average[key] if index is None else average[key][:, index]

    value = part("value")
    low, high = positive_interval_95(value, part("stderr_adjusted"), np.inf)
    return {
        f"{name}_averaged_{unit}": value,
        f"{name}_averaged_stderr_{unit}": np.where(np.isfinite(value), part("stderr"), np.nan),
        f"{name}_averaged_ci95_low_{unit}": low,
        f"{name}_averaged_ci95_high_{unit}": high,
    }


def model_averaged_columns(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                           batch: Batch, flags: list[list[str]]) -> dict[str, np.ndarray]:
    """Model-averaged q_sat, Henry constant, loadings and working capacity at the
    conditions of ``loading_columns``, each with its standard error and interval."""
    columns: dict[str, np.ndarray] = {}
    left_out = np.zeros(packed.n)

    q_sat = averaged_q_sat(packed, fits, selection)
    columns.update(_figure_columns("q_sat", "mol_per_kg", q_sat))
    columns["q_sat_averaged_weight_share"] = q_sat["weight_share"]
    left_out = np.maximum(left_out, q_sat["left_out_weight"])

    henry = averaged_henry(packed, fits, selection)
    columns.update(_figure_columns("henry", "mol_per_kg_pa", henry))
    columns["henry_averaged_weight_share"] = henry["weight_share"]
    left_out = np.maximum(left_out, henry["left_out_weight"])

    cond = batch.conditions
    named = [cond.adsorption_pressure_pa, cond.desorption_pressure_pa,
             *cond.reference_pressures_pa]
    pressure = np.broadcast_to(np.asarray(named, dtype=float), (packed.n, len(named)))
    loadings = averaged_loadings(packed, fits, selection, pressure, swing_pairs=(0, 1))
    columns.update(_figure_columns("loading_ads", "mol_per_kg", loadings, 0))
    columns.update(_figure_columns("loading_des", "mol_per_kg", loadings, 1))
    columns.update(_figure_columns("working_capacity", "mol_per_kg", loadings, len(named)))
    for j, p in enumerate(named[2:], start=2):
        columns.update(_figure_columns(f"loading_at_{pressure_label(p)}_pa", "mol_per_kg",
                                       loadings, j))
    left_out = np.maximum(left_out, np.max(loadings["left_out_weight"], axis=1))

    add_flag(flags, left_out > MODEL_AVERAGE_LEFT_OUT_WEIGHT, "model_average_partial")
    return columns
