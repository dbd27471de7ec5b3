"""The normalised inputs table: Isotherms to Arrow and back."""
from __future__ import annotations

import json
from typing import Iterable

import numpy as np
import pyarrow as pa

from ..isotherm import Isotherm
from .layout import original_json
from .schema import INPUTS, QUALITY_FLAGS

INPUT_SCHEMA = INPUTS  # declared in schema.py


def _float_lists(arrays: list) -> pa.Array:
    """list<double> column from per-row arrays (None = null), built in one go."""
    lengths = np.array([0 if a is None else len(a) for a in arrays], dtype=np.int64)
    offsets = np.concatenate([[0], np.cumsum(lengths)])
    present = [np.asarray(a, dtype=np.float64).ravel() for a in arrays if a is not None]
    values = np.concatenate(present) if present else np.empty(0, dtype=np.float64)
    missing = np.array([a is None for a in arrays], dtype=bool)
    list_type = pa.list_(pa.float64())
    return pa.ListArray.from_arrays(pa.array(offsets, pa.int32()), pa.array(values, pa.float64()),
                                    type=list_type,
                                    mask=pa.array(missing) if missing.any() else None)


def isotherms_to_table(isotherms: Iterable[Isotherm]) -> pa.Table:
    # column by column: the point arrays go to Arrow as whole numpy buffers,
    # never value by value (the same table as building it row by row)
    isotherms = list(isotherms)
    columns = {
        "isotherm_id": pa.array([iso.isotherm_id for iso in isotherms], pa.string()),
        "sorbent_id": pa.array([iso.sorbent_id for iso in isotherms], pa.string()),
        "adsorbate": pa.array([iso.adsorbate for iso in isotherms], pa.string()),
        "temperature_k": pa.array([float(iso.temperature_k) for iso in isotherms], pa.float64()),
        "branch": pa.array([iso.branch for iso in isotherms], pa.string()),
        "saturation_pressure_pa": pa.array([iso.saturation_pressure_pa for iso in isotherms],
                                           pa.float64()),
        "surface_area_m2_per_g": pa.array([iso.surface_area_m2_per_g for iso in isotherms],
                                          pa.float64()),
        "batch_label": pa.array([iso.batch_label for iso in isotherms], pa.string()),
        QUALITY_FLAGS: pa.array([list(iso.flags) for iso in isotherms], pa.list_(pa.string())),
        "pressure_pa": _float_lists([iso.pressure_pa for iso in isotherms]),
        "loading_mol_per_kg": _float_lists([iso.loading_mol_per_kg for iso in isotherms]),
        "sigma_mol_per_kg": _float_lists([iso.sigma_mol_per_kg for iso in isotherms]),
        "original_json": pa.array([original_json(iso.original) for iso in isotherms], pa.string()),
    }
    return pa.Table.from_arrays(list(columns.values()), schema=INPUT_SCHEMA)


def _isotherms_to_table_by_rows(isotherms: Iterable[Isotherm]) -> pa.Table:
    """Row by row, the plain way; tests check ``isotherms_to_table`` equals it."""
    rows = [{
        "isotherm_id": iso.isotherm_id,
        "sorbent_id": iso.sorbent_id,
        "adsorbate": iso.adsorbate,
        "temperature_k": float(iso.temperature_k),
        "branch": iso.branch,
        "saturation_pressure_pa": iso.saturation_pressure_pa,
        "surface_area_m2_per_g": iso.surface_area_m2_per_g,
        "batch_label": iso.batch_label,
        QUALITY_FLAGS: list(iso.flags),
        "pressure_pa": [float(v) for v in iso.pressure_pa],
        "loading_mol_per_kg": [float(v) for v in iso.loading_mol_per_kg],
        "sigma_mol_per_kg": None if iso.sigma_mol_per_kg is None
        else [float(v) for v in iso.sigma_mol_per_kg],
        "original_json": original_json(iso.original),
    } for iso in isotherms]
    return pa.Table.from_pylist(rows, schema=INPUT_SCHEMA)


def table_to_isotherms(table: pa.Table) -> list[Isotherm]:
    import numpy as np

    out = []
    for row in table.to_pylist():
        sigma = row["sigma_mol_per_kg"]
        out.append(Isotherm(
            isotherm_id=row["isotherm_id"],
            sorbent_id=row["sorbent_id"],
            adsorbate=row["adsorbate"],
            temperature_k=row["temperature_k"],
            pressure_pa=np.asarray(row["pressure_pa"], dtype=float),
            loading_mol_per_kg=np.asarray(row["loading_mol_per_kg"], dtype=float),
            branch=row["branch"],
            saturation_pressure_pa=row["saturation_pressure_pa"],
            sigma_mol_per_kg=None if sigma is None else np.asarray(sigma, dtype=float),
            surface_area_m2_per_g=row["surface_area_m2_per_g"],
            batch_label=row["batch_label"],
            flags=list(row[QUALITY_FLAGS] or []),
            original=json.loads(row["original_json"]),
        ))
    return out

