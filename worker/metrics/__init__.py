"""Screening metrics from each isotherm's selected model (and, for BET, its raw data).

Two entry points, called by the pipeline after selection:

* ``summarize``        one value per isotherm per column (arrays of length n);
* ``sorbent_metrics`` rows per sorbent and gas (isosteric heat, temperature
                       swing) and per mixture (IAST).

A figure the data cannot support is nan with a flag naming why; nothing here
raises on bad input.
"""
from __future__ import annotations

import numpy as np

from ..isotherm import Batch
from ..packing import Packed
from ..results import ModelFits, Selection
from .averaging import model_averaged_columns
from .bet import bet_columns
from .capacity import capacity_columns, gas_volume_cm3stp_per_g, site_density_columns
from .common import (INTERNAL_ERROR, add_flag, flags_as_object_array, has_selected_fit,
                     internal_error_rows, internal_errors_recorded, new_flags, rows_by)
from .fit_quality import fit_quality_columns
from .henry import henry_columns
from .hysteresis import hysteresis_columns
from .iast import iast_rows
from .isosteric import isosteric_heat_rows
from .working import coverage_columns, loading_columns, temperature_swing_rows


def summarize(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
              batch: Batch, weighting: str = "uniform") -> dict[str, np.ndarray]:
    """Summary columns, each an array of length ``packed.n``, canonical units in the names.
    ``weighting`` is the fit's (FitOptions.weighting), for the goodness-of-fit sums."""
    with internal_errors_recorded() as internal_errors:
        columns, flags = _summary_columns(packed, fits, selection, batch, weighting)
    add_flag(flags, internal_error_rows(internal_errors, selection), INTERNAL_ERROR)
    columns["flags"] = flags_as_object_array(flags)
    return columns


def _summary_columns(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                     batch: Batch, weighting: str
                     ) -> tuple[dict[str, np.ndarray], list[list[str]]]:
    flags = new_flags(packed.n)
    add_flag(flags, ~has_selected_fit(selection, fits), "no_selected_model")
    columns: dict[str, np.ndarray] = {}
    columns.update(fit_quality_columns(packed, fits, selection, flags, weighting))
    columns.update(hysteresis_columns(packed, flags))
    columns.update(capacity_columns(packed, fits, selection, flags))
    columns.update(henry_columns(packed, fits, selection, flags))
    columns.update(loading_columns(packed, fits, selection, batch, flags))
    columns.update(coverage_columns(packed, fits, selection, batch, columns["q_sat_mol_per_kg"],
                                    columns["q_sat_model"], flags))
    columns.update(bet_columns(packed, flags))
    columns.update(model_averaged_columns(packed, fits, selection, batch, flags))
    # The BET monolayer (raw data, N2/Ar/Kr) is the monolayer where one was
    # measured; otherwise the selected model's saturation capacity stands in.
    bet_monolayer = columns["bet_monolayer_mol_per_kg"]
    has_bet = np.isfinite(bet_monolayer)
    columns["monolayer_volume_cm3stp_per_g"] = np.where(
        has_bet, gas_volume_cm3stp_per_g(bet_monolayer), columns["monolayer_volume_cm3stp_per_g"])
    columns["monolayer_source"] = np.where(
        has_bet, "bet", np.where(np.isfinite(columns["monolayer_volume_cm3stp_per_g"]),
                                 "q_sat", None)).astype(object)  # type: ignore[call-overload]
    area, source = surface_area_for_sites(packed, columns["bet_area_m2_per_g"])
    columns["surface_area_used_m2_per_g"] = area
    columns["surface_area_source"] = source
    columns.update(site_density_columns(columns["sites_per_g"], area))
    return columns, flags


def surface_area_for_sites(packed: Packed, bet_area_m2_per_g: np.ndarray
                           ) -> tuple[np.ndarray, np.ndarray]:
    """Area (n,) in m2/g to spread the sites over, and where it came from.

    A surface area given with the isotherm wins; otherwise the mean of the
    valid BET areas measured on the same sorbent in this batch.
    """
    given = np.isfinite(packed.surface_area_m2_per_g) & (packed.surface_area_m2_per_g > 0)
    area = np.where(given, packed.surface_area_m2_per_g, np.nan)
    # numpy's stubs take no bare None as a value; numpy itself does (an object array)
    source = np.where(given, "given", None).astype(object)  # type: ignore[call-overload]
    measured = np.isfinite(bet_area_m2_per_g)
    for members in rows_by(packed.sorbent_ids, range(len(packed.sorbent_ids))).values():
        rows = np.asarray(members)
        with_area = rows[measured[rows]]
        if with_area.size == 0:
            continue
        fill = rows[~given[rows]]
        area[fill] = np.mean(bet_area_m2_per_g[with_area])
        source[fill] = "bet"
    return area, source


def sorbent_metrics(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                     batch: Batch) -> list[dict]:
    """Flat rows per sorbent and gas, and per mixture request."""
    usable = has_selected_fit(selection, fits)
    with internal_errors_recorded() as internal_errors:
        rows = isosteric_heat_rows(packed, fits, selection, usable)
        rows += temperature_swing_rows(packed, fits, selection, batch, usable)
        rows += iast_rows(packed, fits, selection, batch.mixtures, usable)
    if internal_errors:
        hit = internal_error_rows(internal_errors, selection)
        index = {iso_id: i for i, iso_id in enumerate(packed.isotherm_ids)}
        for row in rows:
            if any(hit[index[iso_id]] for iso_id in row.get("isotherm_ids") or ()):
                row["flags"].append(INTERNAL_ERROR)
    return rows


__all__ = ["summarize", "sorbent_metrics"]
