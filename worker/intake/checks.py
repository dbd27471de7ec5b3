"""Per-row checks (missing, not a number, negative, bad ids, unknown adsorbate or
branch) and the physical-range checks after conversion.
"""
from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from .. import adsorbates
from ..arrays import BoolArray, FloatArray, IntArray
from ..csvcodec import formula_problem
from .issues import Findings, short
from .rows import (
    BLANK,
    BRANCHES,
    MISSING,
    NOT_FINITE,
    NOT_NUMBER,
    NUMBER_FIELDS,
    OK,
    UNITS_HINT,
    Numbers,
    Rows,
    Text,
    per_row,
)
from .source import character_problem, id_problem


def range_checks(found: Findings, number: dict[str, Numbers],
                 unit_names: dict[str, tuple[list[str], IntArray]],
                 canonical: dict[str, tuple[FloatArray, str, float]]) -> None:
    """Record ``out_of_range`` for every usable value whose canonical form is above its
    physical bound (``sorbrank.worker.units``), infinite after an overflowing conversion
    included: the message gives the value as sent with its unit and what it became."""
    for name, (converted, canon, bound) in canonical.items():
        sent = number[name]
        with np.errstate(invalid="ignore"):
            mask = (sent.problem == OK) & (converted > bound)
        table, unit_index = unit_names.get(name, (None, None))

        def detail(i: int, sent: Numbers = sent, converted: FloatArray = converted,
                   canon: str = canon, bound: float = bound, table: list[str] | None = table,
                   unit_index: IntArray | None = unit_index) -> str:
            unit = canon if table is None or unit_index is None else (
                table[unit_index[i]] if unit_index[i] >= 0 else "")
            given = f"{sent.value[i]:g} {unit}"
            if unit == canon:
                return f"{given} is above the limit {bound:g} {canon}"
            if np.isinf(converted[i]):
                return f"{given} overflows when converted to {canon} (limit {bound:g} {canon})"
            return f"{given} is {converted[i]:.3g} {canon}, above the limit {bound:g} {canon}"
        found.rows_where(mask, name, "out_of_range", detail)


def missing_unit(quantity: str, sent_as: str) -> str:
    if quantity == "saturation_pressure":
        return (f"no unit for {sent_as!r}: the pressures are relative, so name its unit "
                "(e.g. saturation_pressure_kpa) or declare it (units saturation_pressure:kPa)")
    return f"no unit for {sent_as!r}: {UNITS_HINT}"


def missing_p0(gas: adsorbates.Adsorbate, temperature_k: float, is_declared: bool) -> str:
    if is_declared:
        why = f"{gas.id} is a declared gas, which has no saturation-pressure table"
    else:
        why = (f"none is defined for {gas.id} at {temperature_k:g} K (supercritical or outside "
               "the property table's range)")
    return (f"pressures are relative but no saturation pressure is given and {why}; give it "
            "in a saturation_pressure column (e.g. saturation_pressure_kpa)")


def row_checks(found: Findings, rows: Rows, text: dict[str, Text], number: dict[str, Numbers],
               branch: IntArray, ads: IntArray, is_relative: BoolArray) -> None:
    """Record every per-row problem (vectorised; messages built lazily)."""
    def raw(name: str) -> Callable[[int], str]:
        return lambda i: f"value {short(number[name].raw(i))!r}"

    def missing(sent: str) -> Callable[[int], str]:
        return lambda i: f"{sent!r} is missing"

    def raw_then(name: str, tail: str) -> Callable[[int], str]:
        r = raw(name)
        return lambda i: f"{r(i)} {tail}"

    def bad_value_of(name: str, column: Text,
                     problems: Sequence[str | None]) -> Callable[[int], str]:
        return lambda i: f"{name} {short(column.values[column.codes[i]])!r} {problems[column.codes[i]]}"

    def not_a_number(name: str) -> Callable[[int], str]:
        def detail(i: int) -> str:
            value = str(number[name].raw(i))
            if rows.decimal == ",":
                note = " (this file's numbers use decimal commas)"
            elif rows.source == "csv" and "," in value:
                note = " (this file's numbers use decimal points)"
            else:
                note = ""
            return f"value {short(value)!r} is not a number{note}"
        return detail

    for name in ("sorbent_id", "adsorbate"):
        found.rows_where(text[name].codes == BLANK, name, "missing_value", missing(name))
    for name in NUMBER_FIELDS:
        problem = number[name].problem
        required = name in ("temperature_k", "pressure", "loading")
        sent = rows.column_names.get(name, name)
        if required:
            found.rows_where(problem == MISSING, name, "missing_value", missing(sent))
        found.rows_where(problem == NOT_NUMBER, name, "not_a_number", not_a_number(name))
        found.rows_where(problem == NOT_FINITE, name, "not_finite",
                         raw_then(name, "is not finite (NaN or infinity)"))
    for name in ("pressure", "loading"):
        found.rows_where(number[name].value < 0, name, "negative_value",
                         raw_then(name, "is negative"))
    for name in ("temperature_k", "saturation_pressure", "sample_mass_g", "loading_sigma",
                 "surface_area_m2_per_g"):
        found.rows_where(number[name].value <= 0, name, "non_positive_value",
                         raw_then(name, "must be greater than zero"))
    found.rows_where(is_relative & (number["pressure"].value > 1.0), "pressure",
                     "relative_pressure_above_one",
                     lambda i: f"relative pressure p/p0 = {short(number['pressure'].raw(i))} "
                               "is above 1")

    for name in ("sorbent_id", "isotherm_id"):
        column = text[name]
        problems = [id_problem(v) for v in column.values]
        bad_value = per_row(column.codes, [p is not None for p in problems], False, bool)
        found.rows_where(bad_value, name, "invalid_id", bad_value_of(name, column, problems),
                         once=True)
        # an id the CSV formula guard would rewrite is refused, so that every export
        # (JSON, CSV, Parquet, Arrow) carries it byte for byte
        formula = [None if p is not None else formula_problem(v)
                   for v, p in zip(column.values, problems)]
        found.rows_where(per_row(column.codes, [f is not None for f in formula], False, bool),
                         name, "formula_start", bad_value_of(name, column, formula), once=True)
    bad_text: dict[str, BoolArray] = {}
    for name in ("adsorbate", "branch"):
        column = text[name]
        problems = [character_problem(v, format_characters=False) for v in column.values]
        bad_text[name] = per_row(column.codes, [p is not None for p in problems], False, bool)
        found.rows_where(bad_text[name], name, "invalid_text",
                         bad_value_of(name, column, problems), once=True)
    adsorbate = text["adsorbate"]
    found.rows_where((ads == UNKNOWN_ADSORBATE) & ~bad_text["adsorbate"], "adsorbate", "unknown_adsorbate",
                     lambda i: unknown_adsorbate(adsorbate.values[adsorbate.codes[i]]), once=True)
    found.rows_where((branch == -1) & ~bad_text["branch"], "branch", "unknown_branch",
                     lambda i: f"branch {short(text['branch'].values[text['branch'].codes[i]])!r} "
                               f"is not one of {', '.join(BRANCHES)}", once=True)


# per-row adsorbate index: a name that is not a known gas; no name at all
UNKNOWN_ADSORBATE, NO_ADSORBATE = -1, -2


def lookup_adsorbate(name: str, declared: list[adsorbates.Adsorbate]
                     ) -> adsorbates.Adsorbate | None:
    """The Adsorbate called ``name``: a gas declared for this batch or one of the table."""
    return adsorbates.lookup(name, declared=declared) if declared else adsorbates.lookup(name)


def unknown_adsorbate(name: str) -> str:
    near = adsorbates.suggest(name)
    return f"unknown adsorbate {short(name)!r}" + (f"; did you mean {near!r}?" if near else "")

