"""Which ranked figures the data supports, and the conditions behind them."""
from __future__ import annotations

from typing import Any, Callable

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..arrays import BoolArray, FloatArray

# a saturation capacity whose standard error exceeds this share of it is not
# ranked on (common practice for "poorly determined", no published source)
Q_SAT_MAX_RELATIVE_STDERR = 0.25
# sort column -> the boolean column that says whether a row's value is supported
RELIABILITY_OF_SORT = {
    "loading_ads_mol_per_kg": "loading_ads_reliable",
    "working_capacity_mol_per_kg": "working_capacity_reliable",
    "q_sat_mol_per_kg": "q_sat_reliable",
    "q_sat_stderr_mol_per_kg": "q_sat_reliable",
    "q_sat_ci95_low_mol_per_kg": "q_sat_reliable",
    "q_sat_ci95_high_mol_per_kg": "q_sat_reliable",
}
# reliability column -> (value columns it is judged on, flags that make it an extrapolation)
_RELIABILITY_RULES = {
    "q_sat_reliable": (("q_sat_mol_per_kg", "q_sat_stderr_mol_per_kg"),
                       ("capacity_extrapolated",)),
    "loading_ads_reliable": (("loading_ads_mol_per_kg",), ("extrapolated_adsorption_pressure",)),
    "working_capacity_reliable": (("working_capacity_mol_per_kg",),
                                  ("extrapolated_adsorption_pressure",
                                   "extrapolated_desorption_pressure")),
}
# the process conditions behind the per-isotherm loadings and working capacity
# (a pressure swing at the isotherm's own temperature)
CONDITION_COLUMNS = ("adsorption_pressure_pa", "desorption_pressure_pa",
                     "adsorption_temperature_k", "desorption_temperature_k")
# sort column -> the condition columns its value depends on
CONDITIONS_OF_SORT = {
    "loading_ads_mol_per_kg": ("adsorption_pressure_pa", "adsorption_temperature_k"),
    "loading_des_mol_per_kg": ("desorption_pressure_pa", "desorption_temperature_k"),
    "working_capacity_mol_per_kg": CONDITION_COLUMNS,
}


def conditions_of_sort(sort: str) -> tuple[str, ...]:
    """The condition columns a ranking by ``sort`` depends on (none for other figures)."""
    return CONDITIONS_OF_SORT.get(sort, ())


def rows_with_flag(flags: pa.Array | pa.ChunkedArray, name: str) -> BoolArray:
    """(n,) bool: which rows of a flags column (list of strings, or "a;b" text) hold ``name``."""
    flags = flags.combine_chunks() if isinstance(flags, pa.ChunkedArray) else flags
    if (pa.types.is_list(flags.type) or pa.types.is_large_list(flags.type)) and (
            pa.types.is_string(flags.type.value_type)
            or pa.types.is_large_string(flags.type.value_type)):
        # vectorised: nulls and null items hold none
        values = pc.list_flatten(flags)
        parents = pc.list_parent_indices(flags).to_numpy(zero_copy_only=False)
        hit = pc.equal(values, name).fill_null(False).to_numpy(zero_copy_only=False)
        has = np.zeros(len(flags), dtype=bool)
        has[parents[hit]] = True
        return has
    return np.array([name in _row_flags(f) for f in flags.to_pylist()], dtype=bool)


def _float_values(table: pa.Table, name: str) -> FloatArray:
    """A column as float64 (null -> NaN); all NaN when the table lacks it."""
    if name not in table.column_names:
        return np.full(table.num_rows, np.nan)
    column = table[name]
    if not (pa.types.is_floating(column.type) or pa.types.is_integer(column.type)
            or pa.types.is_null(column.type)):
        return np.full(table.num_rows, np.nan)
    return np.asarray(pc.cast(column, pa.float64()).to_numpy(zero_copy_only=False),
                      dtype=np.float64)


def reliable_rows(table: pa.Table, reliability: str) -> BoolArray:
    """(n,) bool: the rows whose figure the ``reliability`` rule accepts.

    A figure is reliable when it is a finite number, no flag marks it as an
    extrapolation, and, for the saturation capacity, it is positive with a
    standard error at most Q_SAT_MAX_RELATIVE_STDERR of it. Judged from the
    stored values and flags, so rows written before the rule existed get it too."""
    values, extrapolation_flags = _RELIABILITY_RULES[reliability]
    with np.errstate(invalid="ignore", divide="ignore"):
        figure = _float_values(table, values[0])
        ok = np.isfinite(figure)
        if reliability == "q_sat_reliable":
            stderr = _float_values(table, values[1])
            ok &= (figure > 0) & np.isfinite(stderr) & (stderr <= Q_SAT_MAX_RELATIVE_STDERR * figure)
    if "quality_flags" in table.column_names:
        for name in extrapolation_flags:
            ok &= ~rows_with_flag(table["quality_flags"], name)
    return ok


def _row_flags(value: str | list[str] | None) -> set[str]:
    if value is None:
        return set()
    if isinstance(value, str):  # tolerate flags stored as "a;b"
        return {f for f in value.replace(",", ";").split(";") if f}
    return set(value)



def _column_list(table: pa.Table, name: str) -> list[Any]:
    return table[name].to_pylist() if name in table.column_names else [None] * table.num_rows


def with_ranking_columns(table: pa.Table, pressures: list[tuple[float, float] | None]
                         ) -> pa.Table:
    """``table`` with the condition columns (adsorption and desorption
    pressure of each row's batch, ``pressures``: (p_ads, p_des) in Pa or None
    per row; both temperatures are the isotherm's own, a pressure swing) and
    the reliability columns. Columns the rows already carry are kept."""
    def add(t: pa.Table, name: str, values: pa.Array) -> pa.Table:
        return t if name in t.column_names else t.append_column(name, values)

    temperature = table["temperature_k"] if "temperature_k" in table.column_names else \
        pa.nulls(table.num_rows, pa.float64())
    columns = {
        "adsorption_pressure_pa": pa.array([None if p is None else p[0] for p in pressures],
                                           pa.float64()),
        "desorption_pressure_pa": pa.array([None if p is None else p[1] for p in pressures],
                                           pa.float64()),
        "adsorption_temperature_k": temperature,
        "desorption_temperature_k": temperature,
    }
    for name, values in columns.items():
        table = add(table, name, values)
    for reliability in _RELIABILITY_RULES:
        # judged again on every read: the rule applies to rows stored before it existed
        if reliability in table.column_names:
            table = table.drop_columns([reliability])
        table = table.append_column(reliability, pa.array(reliable_rows(table, reliability)))
    return table


def condition_sets(ranked: pa.Table,
                   pressures_of_batch: Callable[[str | None], tuple[float, float] | None],
                   names: tuple[str, ...], temperature_tolerance_k: float
                   ) -> list[dict[str, Any]]:
    """The distinct values of the condition columns ``names`` over the ranked
    rows (batch_id, temperature_k), with how many rows each holds, most first.

    Temperatures that lie within ``temperature_tolerance_k`` of the lowest of
    a run count as one (the ranking's own "same temperature"); a set shows
    their mean. Pressures are the batch's, compared exactly."""
    if not names or ranked.num_rows == 0:
        return []
    batches = _column_list(ranked, "batch_id")
    pressures = {b: pressures_of_batch(b) for b in set(batches)}
    temperature = np.asarray(_float_values(ranked, "temperature_k"))
    cluster = np.full(len(temperature), -1, dtype=np.int64)   # -1: unknown temperature
    known = np.flatnonzero(np.isfinite(temperature))
    means: list[float] = []
    if known.size:
        order = known[np.argsort(temperature[known], kind="stable")]
        start = None
        runs: list[list[float]] = []
        for i in order:
            if start is None or temperature[i] - start > temperature_tolerance_k:
                start = temperature[i]
                runs.append([])
            runs[-1].append(temperature[i])
            cluster[i] = len(runs) - 1
        means = [round(float(np.mean(m)), 2) for m in runs]
    counts: dict[tuple[float | None, ...], int] = {}
    for batch, c in zip(batches, cluster):
        p = pressures.get(batch)
        values = {"adsorption_pressure_pa": None if p is None else p[0],
                  "desorption_pressure_pa": None if p is None else p[1],
                  "adsorption_temperature_k": None if c < 0 else means[c],
                  "desorption_temperature_k": None if c < 0 else means[c]}
        key = tuple(values[n] for n in names)
        counts[key] = counts.get(key, 0) + 1
    ordered = sorted(counts.items(), key=lambda kv: (-kv[1], [(v is None, v or 0) for v in kv[0]]))
    return [{**dict(zip(names, key)), "rows": n} for key, n in ordered]

