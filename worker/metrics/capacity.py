"""Saturation capacity with its interval, its kind, monolayer volume, site density."""
from __future__ import annotations

import numpy as np
from scipy import constants

from ..interrupts import ends_job
from ..models import IsothermModel
from ..packing import Packed
from ..results import ModelFits, Selection
from .common import (MOLAR_VOLUME_STP_CM3_PER_MOL, add_flag, max_measured_loading,
                     note_internal_error, positive_interval_95)

# A capacity is an extrapolation when the data never reach half of it.
CAPACITY_EXTRAPOLATION_FRACTION = 0.5
# q_sat_kind values: a plateau of sites, or the filled micropore volume at p0
MONOLAYER, PORE_FILLING = "monolayer", "pore_filling"


def saturation_capacity_gradient(model: type[IsothermModel], params: np.ndarray) -> np.ndarray:
    """d q_sat / d params (g, k) by central differences of ``model.saturation_capacity``.

    Differences keep this generic over the catalogue; q_sat is a sum of
    parameters for every model that defines it, where the difference is exact.
    """
    g, k = params.shape
    grad = np.full((g, k), np.nan)
    for j in range(k):
        step = 1e-6 * np.maximum(np.abs(params[:, j]), 1e-12)
        up, down = params.copy(), params.copy()
        up[:, j] += step
        down[:, j] -= step
        q_up, q_down = model.saturation_capacity(up), model.saturation_capacity(down)
        if q_up is None or q_down is None:  # callers ask only models that define q_sat
            raise TypeError(f"model {model.id} defines no saturation capacity")
        grad[:, j] = (q_up - q_down) / (2 * step)
    return grad


def capacity_models(selection: Selection, fits: dict[str, ModelFits]) -> np.ndarray:
    """Per isotherm, the model q_sat is read from (object array; None = none).

    The selected model where it defines a saturation capacity. Otherwise the
    eligible model with the highest Akaike weight among those that do: a
    screening team ranks on capacity even when an unbounded model (e.g.
    Redlich-Peterson, which defines no plateau) wins the selection on noise.
    Not when a multilayer model (BET, GAB) is selected: it competes only where
    the data reach into the multilayer range (selection.data_range_exclusions),
    so that isotherm has no plateau, and its figure is the BET monolayer.
    """
    from ..models import CATALOGUE

    n = selection.best.shape[0]
    chosen = np.full(n, None, dtype=object)
    capable = [j for j, m in enumerate(selection.model_ids)
               if m in CATALOGUE and m in fits and CATALOGUE[m].defines_saturation_capacity()]
    if not capable:
        return chosen
    weights = selection.weights[:, capable]
    eligible = np.stack([selection.excluded.get(selection.model_ids[j], np.full(n, "")) == ""
                         for j in capable], axis=1)
    weights = np.where(eligible & np.isfinite(weights), weights, -1.0)
    best_capable = np.argmax(weights, axis=1)
    has_capable = weights[np.arange(n), best_capable] >= 0.0
    # decided once per selected model id, then applied to its rows at once
    borrowed = np.full(n, None, dtype=object)
    borrowed[has_capable] = np.array(selection.model_ids, dtype=object)[
        np.asarray(capable)[best_capable[has_capable]]]
    for model_id in set(selection.best) - {None}:
        rows = selection.best == model_id
        model = CATALOGUE.get(model_id)
        if model is not None and model.defines_saturation_capacity():
            chosen[rows] = model_id
        elif model is None or not model.multilayer:
            # a multilayer isotherm has no plateau to borrow from elsewhere
            chosen[rows] = borrowed[rows]
    chosen[selection.best == None] = borrowed[selection.best == None]  # noqa: E711
    return chosen


def capacity_columns(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                     flags: list[list[str]]) -> dict[str, np.ndarray]:
    """q_sat (mol/kg) with its 95 % interval, its kind and model; monolayer volume
    and sites per gram for monolayer-type capacities only.

    The interval is ``positive_interval_95`` (log scale, Student t with the
    capacity model's n - p degrees of freedom): never below zero.
    """
    from ..models import CATALOGUE

    n = packed.n
    q_sat = np.full(n, np.nan)
    q_sat_se = np.full(n, np.nan)
    dof = np.full(n, np.nan)
    kind = np.full(n, None, dtype=object)
    source = capacity_models(selection, fits)
    for model_id in sorted({m for m in source if m is not None}):
        rows = np.flatnonzero(source == model_id)
        model, model_fits = CATALOGUE[model_id], fits[model_id]
        params = model_fits.params[rows]
        try:
            value = model.saturation_capacity(params)
        except Exception as exc:  # a model bug gives nan, not a failed batch
            if ends_job(exc):
                raise
            note_internal_error(model, exc, "saturation_capacity", rows)
            value = None
        if value is None:
            continue
        q_sat[rows] = value
        kind[rows] = PORE_FILLING if model.pore_filling else MONOLAYER
        if model_fits.n_points.shape[0] == model_fits.n:
            dof[rows] = model_fits.n_points[rows] - model_fits.n_params
        grad = saturation_capacity_gradient(model, params)
        cov = model_fits.covariance[rows]
        variance = np.einsum("gi,gij,gj->g", grad, cov, grad)
        with np.errstate(invalid="ignore"):
            q_sat_se[rows] = np.sqrt(np.where(variance >= 0, variance, np.nan))

    with np.errstate(invalid="ignore"):
        has_q_sat = np.isfinite(q_sat) & (q_sat > 0)
    q_sat = np.where(has_q_sat, q_sat, np.nan)
    q_sat_se = np.where(has_q_sat, q_sat_se, np.nan)
    low, high = positive_interval_95(q_sat, q_sat_se, dof)
    add_flag(flags, ~has_q_sat, "no_saturation_capacity")
    add_flag(flags, has_q_sat & (source != selection.best), "q_sat_from_other_model")
    add_flag(flags, has_q_sat & ~np.isfinite(low), "q_sat_interval_unavailable")
    with np.errstate(invalid="ignore"):
        extrapolated = has_q_sat & (max_measured_loading(packed)
                                    < CAPACITY_EXTRAPOLATION_FRACTION * q_sat)
    add_flag(flags, extrapolated, "capacity_extrapolated")
    # sites and a monolayer volume mean one molecule per site of a monolayer:
    # a filled pore volume is no such count
    monolayer = np.where(has_q_sat & (kind == MONOLAYER), q_sat, np.nan)

    return {
        "q_sat_mol_per_kg": q_sat,
        # numpy's stubs take no bare None as a value; numpy itself does (an object array)
        "q_sat_model": np.where(has_q_sat, source, None),  # type: ignore[call-overload]
        "q_sat_kind": np.where(has_q_sat, kind, None),  # type: ignore[call-overload]
        "q_sat_stderr_mol_per_kg": q_sat_se,
        "q_sat_ci95_low_mol_per_kg": low,
        "q_sat_ci95_high_mol_per_kg": high,
        "monolayer_volume_cm3stp_per_g": gas_volume_cm3stp_per_g(monolayer),
        "sites_per_g": sites_per_g(monolayer),
    }


def gas_volume_cm3stp_per_g(loading_mol_per_kg: np.ndarray) -> np.ndarray:
    """Ideal-gas volume at 273.15 K, 101.325 kPa of a loading, in cm3(STP)/g."""
    return np.asarray(loading_mol_per_kg) / 1000.0 * MOLAR_VOLUME_STP_CM3_PER_MOL


def sites_per_g(q_sat_mol_per_kg: np.ndarray) -> np.ndarray:
    """Adsorption sites per gram: one molecule per site at saturation."""
    return np.asarray(q_sat_mol_per_kg) / 1000.0 * constants.Avogadro


def site_density_columns(sites: np.ndarray, surface_area_m2_per_g: np.ndarray
                         ) -> dict[str, np.ndarray]:
    """Sites per nm2 and nm2 per site where a surface area is known."""
    area_nm2_per_g = np.asarray(surface_area_m2_per_g) * 1e18
    with np.errstate(divide="ignore", invalid="ignore"):
        known = np.isfinite(area_nm2_per_g) & (area_nm2_per_g > 0) & np.isfinite(sites) & (sites > 0)
        per_nm2 = np.where(known, sites / area_nm2_per_g, np.nan)
        return {
            "sites_per_nm2": per_nm2,
            "area_per_site_nm2": np.where(known, 1.0 / per_nm2, np.nan),
        }
