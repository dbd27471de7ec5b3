"""Loadings at process pressures, pressure-swing and temperature-swing working capacity."""
from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..isotherm import Batch
from ..packing import Packed
from ..results import ModelFits, Selection
from .common import (SAME_TEMPERATURE_TOLERANCE_K, add_flag, measured_pressure_range,
                     pressure_label, rows_by, selected_loading_and_negative)


def outside_measured_range(packed: Packed, pressure_pa: np.ndarray) -> np.ndarray:
    """(n, k) bool: pressure (n, k) lies outside each isotherm's measured pressure range."""
    low, high = measured_pressure_range(packed)
    return (pressure_pa < low[:, None]) | (pressure_pa > high[:, None])


def loading_columns(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                    batch: Batch, flags: list[list[str]]) -> dict[str, np.ndarray]:
    """Loadings (mol/kg) at the adsorption, desorption and reference pressures, and
    the pressure-swing working capacity q(p_ads) - q(p_des) at the isotherm's temperature.

    A loading the model predicts below zero is nan (flag
    ``negative_predicted_loading``), and so is a working capacity built on
    one: with both loadings >= 0 the working capacity never exceeds the
    adsorbed loading.
    """
    cond = batch.conditions
    named = [cond.adsorption_pressure_pa, cond.desorption_pressure_pa,
             *cond.reference_pressures_pa]
    pressure = np.broadcast_to(np.asarray(named, dtype=float), (packed.n, len(named)))
    loading, negative = selected_loading_and_negative(packed, fits, selection, pressure)
    add_flag(flags, negative.any(axis=1), "negative_predicted_loading")
    outside = outside_measured_range(packed, pressure)
    with np.errstate(invalid="ignore"):
        columns = {
            "loading_ads_mol_per_kg": loading[:, 0],
            "loading_des_mol_per_kg": loading[:, 1],
            "working_capacity_mol_per_kg": loading[:, 0] - loading[:, 1],
        }
    add_flag(flags, outside[:, 0], "extrapolated_adsorption_pressure")
    add_flag(flags, outside[:, 1], "extrapolated_desorption_pressure")
    for j, p in enumerate(named[2:], start=2):
        label = pressure_label(p)
        columns[f"loading_at_{label}_pa_mol_per_kg"] = loading[:, j]
        add_flag(flags, outside[:, j], f"extrapolated_loading_at_{label}_pa")
    return columns


def coverage_columns(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                     batch: Batch, q_sat_mol_per_kg: np.ndarray, q_sat_model: np.ndarray,
                     flags: list[list[str]]) -> dict[str, np.ndarray]:
    """Fractional coverage theta = q(p_ads) / q_sat at the adsorption pressure of
    the working-capacity conditions, and that pressure in Pa.

    q(p_ads) comes from the model q_sat was read from (``q_sat_model``), so
    theta is a fraction of that model's own plateau (bp/(1 + bp) for
    Langmuir) even when the capacity was borrowed from another model than
    the selected one. nan where there is no q_sat.
    """
    p_ads = float(batch.conditions.adsorption_pressure_pa)
    pressure = np.full((packed.n, 1), p_ads)
    own = replace(selection, best=np.asarray(q_sat_model, dtype=object))
    loading, negative = selected_loading_and_negative(packed, fits, own, pressure)
    add_flag(flags, negative[:, 0], "negative_predicted_loading")
    with np.errstate(invalid="ignore", divide="ignore"):
        has = np.isfinite(q_sat_mol_per_kg) & (q_sat_mol_per_kg > 0)
        theta = np.where(has, loading[:, 0] / np.where(has, q_sat_mol_per_kg, 1.0), np.nan)
    return {
        "coverage_at_adsorption": theta,
        "coverage_pressure_pa": np.where(np.isfinite(theta), p_ads, np.nan),
    }


def temperature_swing_rows(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                           batch: Batch, usable: np.ndarray) -> list[dict]:
    """Per sorbent and gas: q(p_ads, T_ads) - q(p_des, T_des) when both temperatures were fitted."""
    cond = batch.conditions
    t_ads, t_des = cond.adsorption_temperature_k, cond.desorption_temperature_k
    if t_ads is None or t_des is None:
        return []
    at_ads = usable & (np.abs(packed.temperature_k - t_ads) <= SAME_TEMPERATURE_TOLERANCE_K)
    at_des = usable & (np.abs(packed.temperature_k - t_des) <= SAME_TEMPERATURE_TOLERANCE_K)
    # each isotherm at its own temperature; the swing pressure applies at that end
    pressure = np.where(at_ads, cond.adsorption_pressure_pa, cond.desorption_pressure_pa)[:, None]
    loading, negative = selected_loading_and_negative(packed, fits, selection, pressure)
    loading, negative = loading[:, 0], negative[:, 0]
    outside = outside_measured_range(packed, pressure)[:, 0]

    keys = list(zip(packed.sorbent_ids, packed.adsorbates))
    ads_rows, des_rows = rows_by(keys, np.flatnonzero(at_ads)), rows_by(keys, np.flatnonzero(at_des))

    rows = []
    for key in sorted(ads_rows.keys() & des_rows.keys()):
        sorbent_id, adsorbate = key
        i, k = ads_rows[key][0], des_rows[key][0]  # first isotherm of the batch at each temperature
        flags = []
        if outside[i]:
            flags.append("extrapolated_adsorption_pressure")
        if outside[k]:
            flags.append("extrapolated_desorption_pressure")
        if negative[i] or negative[k]:
            flags.append("negative_predicted_loading")
        rows.append({
            "sorbent_id": sorbent_id,
            "adsorbate": adsorbate,
            "kind": "temperature_swing",
            "adsorption_temperature_k": float(packed.temperature_k[i]),
            "desorption_temperature_k": float(packed.temperature_k[k]),
            "adsorption_pressure_pa": float(cond.adsorption_pressure_pa),
            "desorption_pressure_pa": float(cond.desorption_pressure_pa),
            "loading_ads_mol_per_kg": float(loading[i]),
            "loading_des_mol_per_kg": float(loading[k]),
            "working_capacity_mol_per_kg": float(loading[i] - loading[k]),
            "isotherm_ids": [packed.isotherm_ids[i], packed.isotherm_ids[k]],
            "flags": flags,
        })
    return rows
