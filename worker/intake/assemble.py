"""From ``Rows`` to a ``Batch``: the assembly in named steps, run in this order
(the order of the findings is the order of the issues): fill defaults, group,
adsorbates, units, per-row checks, isotherm-level values, unit and mass checks,
saturation pressures, canonical values and range checks, then the accepted isotherms.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .. import adsorbates, units
from ..adsorbates import Adsorbate
from ..arrays import BoolArray, FloatArray, IntArray
from ..isotherm import Batch
from .accepted import Accepted, Points, non_monotonic_groups, sorted_points
from .checks import (
    NO_ADSORBATE,
    UNKNOWN_ADSORBATE,
    lookup_adsorbate,
    missing_p0,
    missing_unit,
    range_checks,
    row_checks,
)
from .grouping import (
    branch_codes,
    duplicate_ids,
    group_range,
    grouping,
    split_at_turning_point,
)
from .issues import Findings, batch_error, issue, issue_list, short
from .rows import (
    BLANK,
    MISSING,
    NUMBER_FIELDS,
    OK,
    TEXT_FIELDS,
    UNIT_FIELD,
    Limits,
    Numbers,
    Rows,
    Text,
    per_row,
)
from .source import id_problem


def resolved_text(rows: Rows, name: str, default: str | None) -> Text:
    """The text column ``name`` with blanks filled by the batch-wide ``default``."""
    column = rows.text.get(name) or Text(np.full(rows.n_rows, BLANK, dtype=np.int64), [])
    if default is None:
        return column
    values = list(column.values)
    if default not in values:
        values.append(default)
    codes = column.codes.copy()
    codes[codes == BLANK] = values.index(default)
    return Text(codes, values)


def unit_index_per_row(column: Text, table: list[str]) -> IntArray:
    """Per-row index into ``table`` of canonical unit names (the column holds only
    checked canonical names), -1 where blank."""
    return per_row(column.codes, [table.index(v) for v in column.values], -1, np.int64)


def loading_in_mol_per_kg(values: FloatArray, unit: IntArray, table: list[str],
                          molar_mass: FloatArray, mass_g: FloatArray) -> FloatArray:
    """Per row: the loading ``values`` in mol/kg, each converted from the row's loading
    unit (nan where unknown). The values themselves go through the conversion, not a
    factor per unit, so a power-of-ten conversion is correctly rounded (units module)."""
    out = np.full(unit.size, np.nan)
    for index, unit_name in enumerate(table):
        rows_in_unit = unit == index
        if rows_in_unit.any():
            out[rows_in_unit] = units.loading_to_mol_per_kg(
                values[rows_in_unit], unit_name, molar_mass[rows_in_unit], mass_g[rows_in_unit])
    return out


class GroupNames:
    """A readable name per isotherm for issues: its id if usable, else a description.
    Built on demand, since only rejected isotherms need one."""

    def __init__(self, rows: Rows, text: dict[str, Text], gid: IntArray) -> None:
        self.rows, self.text, self.gid = rows, text, gid
        self.first_row: IntArray | None = None

    def __getitem__(self, g: int) -> str:
        if self.rows.group_names is not None:
            return self.rows.group_names[g]
        if self.first_row is None:  # CSV/Parquet groups are never empty
            self.first_row = np.unique(self.gid, return_index=True)[1]
        r = int(self.first_row[g])
        text = self.text
        iso = text["isotherm_id"]
        if iso.codes[r] >= 0 and id_problem(iso.values[iso.codes[r]]) is None:
            return iso.values[iso.codes[r]]
        parts = []
        for name in ("sorbent_id", "adsorbate"):
            column = text[name]
            parts.append(short(column.values[column.codes[r]], 40) if column.codes[r] >= 0 else "?")
        parts.append(f"{short(self.rows.numbers['temperature_k'].raw(r), 20)}K")
        branch = text["branch"]
        parts.append(branch.values[branch.codes[r]] if branch.codes[r] >= 0 else "adsorption")
        return "|".join(parts) + f" (from row {self.rows.row_label[r]})"


def assembled_batch(rows: Rows, settings: dict[str, Any], declared: list[Adsorbate], label: str,
                    limits: Limits) -> Batch:
    """The checked, converted Batch of ``rows``: the steps below, in this order, since
    the order findings are recorded in is the order of the issues."""
    number, text = _filled_columns(rows, settings)
    branch, branch_key = _branches(rows, text)
    gid, n_groups = grouping(rows, branch_key)
    if n_groups > limits.max_isotherms:
        raise batch_error(label, "too_many_isotherms",
                          f"{n_groups} isotherms, limit {limits.max_isotherms}")
    found = Findings(rows, gid, n_groups)
    table, ads, molar_mass = _adsorbates(text, declared)
    unit = _RowUnits.of(text, number)
    row_checks(found, rows, text, number, branch, ads, unit.is_relative)
    group_value = _isotherm_values(found, rows, text, number, branch_key, unit.p0_row, gid, n_groups)
    counts, n_sigma = _unit_and_count_checks(found, rows, number, unit, gid, n_groups, limits)
    p0_g, relative_g, ads_index_g = _saturation_pressures(found, number, group_value, table, ads,
                                                          unit, gid, n_groups)
    _sample_mass_check(found, number, group_value, unit, gid, n_groups)
    points = _canonical_points(found, number, unit, p0_g, molar_mass, group_value, gid, n_groups)
    found.groups_where(~found.bad_groups() & (points.n_distinct < 3), None, "too_few_points",
                       lambda g: f"{points.n_distinct[g]} distinct pressure(s); at least 3 "
                                 "are needed")
    found.groups_where(duplicate_ids(text, gid, n_groups, rows.group is not None), "isotherm_id",
                       "duplicate_isotherm_id", lambda g: "an earlier isotherm has the same isotherm_id")

    names = GroupNames(rows, text, gid)
    batch = Batch(label=label)
    batch.rejected = issue_list(found, names, label)
    accepted = np.flatnonzero(~found.bad_groups())
    if accepted.size == 0:
        return batch
    build = Accepted(
        rows=rows, text=text, number=number, label=label, points=points,
        input_order=np.argsort(gid, kind="stable"),
        input_start=np.concatenate([[0], np.cumsum(counts)]),
        has_sigma=n_sigma > 0, adsorbate=[table[i] if i >= 0 else None for i in ads_index_g],
        group_value=group_value, p0_pa=p0_g, relative_input=relative_g,
        non_monotonic=non_monotonic_groups(points, n_groups))
    _add_accepted(batch, build, accepted, names, label)
    return batch


def _filled_columns(rows: Rows, settings: dict[str, Any]
                    ) -> tuple[dict[str, Numbers], dict[str, Text]]:
    """Every number and text column, absent ones as all-missing, with the batch-wide
    sample mass and units filled in where a row gives none."""
    n = rows.n_rows
    number = rows.numbers
    for name in NUMBER_FIELDS:  # absent optional columns: every cell missing
        number.setdefault(name, Numbers(np.full(n, np.nan), np.full(n, MISSING, np.int8),
                                        lambda i: None))
    if "sample_mass_g" in settings:
        mass = number["sample_mass_g"]
        fill = mass.problem == MISSING
        mass.value = np.where(fill, settings["sample_mass_g"], mass.value)
        mass.problem = np.where(fill, OK, mass.problem).astype(np.int8)
    text = {name: rows.text.get(name) or Text(np.full(n, BLANK, dtype=np.int64), [])
            for name in TEXT_FIELDS}
    declared_units = settings.get("units", {})
    for quantity, fld in UNIT_FIELD.items():
        text[fld] = resolved_text(rows, fld, declared_units.get(quantity))
    return number, text


def _branches(rows: Rows, text: dict[str, Text]) -> tuple[IntArray, IntArray]:
    """Per row: branch index and grouping key, after splitting CSV/Parquet/Table
    isotherms at their pressure turning point (``text["branch"]`` is updated)."""
    branch, branch_key = branch_codes(text["branch"])
    if rows.group is None:
        text["branch"] = split_at_turning_point(rows, text, grouping(rows, branch_key)[0])
        branch, branch_key = branch_codes(text["branch"])
    return branch, branch_key


def _adsorbates(text: dict[str, Text], declared: list[Adsorbate]
                ) -> tuple[list[Adsorbate], IntArray, FloatArray]:
    """The distinct known adsorbates, each row's index into them (UNKNOWN_ADSORBATE,
    NO_ADSORBATE) and each row's molar mass (nan where not known)."""
    known = [lookup_adsorbate(v, declared) for v in text["adsorbate"].values]
    table = [a for a in dict.fromkeys(a for a in known if a is not None)]
    ads = per_row(text["adsorbate"].codes,
                  [table.index(a) if a is not None else UNKNOWN_ADSORBATE for a in known],
                  NO_ADSORBATE, np.int64)
    molar_mass = per_row(ads, [a.molar_mass_g_per_mol for a in table], np.nan, float)
    return table, ads, molar_mass


@dataclass
class _RowUnits:
    """Per row: the index of each quantity's unit in ``pressure_units`` or
    ``loading_units`` (-1: none), and what follows from them."""

    pressure_units: list[str]
    loading_units: list[str]
    pressure: IntArray
    loading: IntArray
    saturation_pressure: IntArray
    loading_sigma: IntArray
    is_relative: BoolArray
    pa_per_unit: FloatArray    # of the pressure (nan: relative or none)
    p0_row: FloatArray         # saturation pressure in Pa as each row gives it

    @classmethod
    def of(cls, text: dict[str, Text], number: dict[str, Numbers]) -> _RowUnits:
        p_table = list(units.PRESSURE_PA_PER_UNIT)
        l_table = list(units.LOADING_UNIT_TABLE)
        p_unit = unit_index_per_row(text[UNIT_FIELD["pressure"]], p_table)
        l_unit = unit_index_per_row(text[UNIT_FIELD["loading"]], l_table)
        is_relative = p_unit == p_table.index(units.RELATIVE)
        # a plain saturation pressure is in the pressure unit, if that is absolute;
        # a plain loading_sigma in the loading unit
        p0_unit = unit_index_per_row(text[UNIT_FIELD["saturation_pressure"]], p_table)
        p0_unit = np.where((p0_unit < 0) & ~is_relative, p_unit, p0_unit)
        sigma_unit = unit_index_per_row(text[UNIT_FIELD["loading_sigma"]], l_table)
        sigma_unit = np.where(sigma_unit < 0, l_unit, sigma_unit)
        factors = [np.nan if f is None else f for f in units.PRESSURE_PA_PER_UNIT.values()]
        with np.errstate(over="ignore"):  # an overflow is reported by range_checks
            p0_row = number["saturation_pressure"].value * per_row(p0_unit, factors, np.nan, float)
        return cls(p_table, l_table, p_unit, l_unit, p0_unit, sigma_unit, is_relative,
                   per_row(p_unit, factors, np.nan, float), p0_row)


def _isotherm_values(found: Findings, rows: Rows, text: dict[str, Text],
                     number: dict[str, Numbers], branch_key: IntArray, p0_row: FloatArray,
                     gid: IntArray, n_groups: int) -> dict[str, FloatArray]:
    """Per isotherm: each isotherm-level value, which must be the same on every row that
    gives it (``inconsistent_value`` otherwise); nan where no row does."""
    n = rows.n_rows
    group_value: dict[str, FloatArray] = {}
    for fld, values, given, code in [
        ("sorbent_id", text["sorbent_id"].codes, text["sorbent_id"].codes >= 0, "inconsistent_value"),
        ("adsorbate", text["adsorbate"].codes, text["adsorbate"].codes >= 0, "inconsistent_value"),
        ("temperature_k", number["temperature_k"].value, number["temperature_k"].problem == OK,
         "inconsistent_value"),
        ("branch", branch_key, np.ones(n, dtype=bool), "inconsistent_value"),
        ("saturation_pressure", p0_row, np.isfinite(p0_row), "inconsistent_value"),
        ("sample_mass_g", number["sample_mass_g"].value, number["sample_mass_g"].problem == OK,
         "inconsistent_value"),
        ("surface_area_m2_per_g", number["surface_area_m2_per_g"].value,
         number["surface_area_m2_per_g"].problem == OK, "inconsistent_value"),
    ]:
        low, high = group_range(values.astype(float), given, gid, n_groups)
        def differ(g: int, f: str = fld) -> str:
            return f"rows of this isotherm give different values for {rows.field_name(f, g)!r}"
        found.groups_where(high > low, fld, code, differ)
        group_value[fld] = np.where(np.isfinite(low), low, np.nan)
    return group_value


def _unit_and_count_checks(found: Findings, rows: Rows, number: dict[str, Numbers],
                           unit: _RowUnits, gid: IntArray, n_groups: int,
                           limits: Limits) -> tuple[IntArray, FloatArray]:
    """Record missing units (one per quantity and isotherm: a JSON isotherm's own, else
    the batch's), a partial loading_sigma and too many points; return the points and
    the points with a sigma per isotherm."""
    n = rows.n_rows
    for quantity, index, needed in (
            ("pressure", unit.pressure, np.ones(n, dtype=bool)),
            ("loading", unit.loading, np.ones(n, dtype=bool)),
            ("saturation_pressure", unit.saturation_pressure,
             number["saturation_pressure"].problem == OK)):
        missing = np.bincount(gid, weights=needed & (index < 0), minlength=n_groups) > 0
        def no_unit(g: int, q: str = quantity) -> str:
            return missing_unit(q, rows.field_name(q, g))
        found.groups_where(missing, quantity, "missing_unit", no_unit)

    sigma_given = number["loading_sigma"].problem == OK
    # numpy's stub gives bincount an intp result; with weights it is float64
    n_sigma: FloatArray = np.bincount(gid, weights=sigma_given,  # type: ignore[assignment]
                                      minlength=n_groups)
    counts = np.bincount(gid, minlength=n_groups)
    found.groups_where((n_sigma > 0) & (n_sigma < counts), "loading_sigma", "missing_value",
                       lambda g: "loading_sigma is given for some points but not all")
    found.groups_where(counts > limits.max_points_per_isotherm, None, "too_many_points",
                       lambda g: f"{counts[g]} points, limit {limits.max_points_per_isotherm}")
    return counts, n_sigma


def _saturation_pressures(found: Findings, number: dict[str, Numbers],
                          group_value: dict[str, FloatArray], table: list[Adsorbate],
                          ads: IntArray, unit: _RowUnits, gid: IntArray,
                          n_groups: int) -> tuple[FloatArray, BoolArray, IntArray]:
    """Per isotherm: the saturation pressure in Pa (given, else from the property table;
    nan if neither), whether its pressures are relative, and its adsorbate's index
    (-1: none); a relative isotherm without one is ``missing_saturation_pressure``."""
    temperature_g = group_value["temperature_k"]
    ads_index_g = np.full(n_groups, -1, dtype=np.int64)
    low, _ = group_range(ads.astype(float), ads >= 0, gid, n_groups)
    ads_index_g[np.isfinite(low)] = low[np.isfinite(low)].astype(np.int64)
    p0_g = group_value["saturation_pressure"].copy()
    for g in np.flatnonzero(np.isnan(p0_g) & (ads_index_g >= 0) & np.isfinite(temperature_g)):
        computed = adsorbates.relative_pressure_p0_pa(table[ads_index_g[g]], temperature_g[g])
        p0_g[g] = np.nan if computed is None else computed
    relative_g = group_range(unit.is_relative.astype(float), unit.pressure >= 0, gid,
                             n_groups)[1] == 1.0
    p0_sent_g = np.bincount(gid, weights=number["saturation_pressure"].problem == OK,
                            minlength=n_groups) > 0   # sent without a usable unit: reported above
    found.groups_where(relative_g & np.isnan(p0_g) & ~p0_sent_g & (ads_index_g >= 0)
                       & np.isfinite(temperature_g),
                       "saturation_pressure", "missing_saturation_pressure",
                       lambda g: missing_p0(table[ads_index_g[g]], temperature_g[g],
                                            adsorbates.lookup(table[ads_index_g[g]].id) is None))
    return p0_g, relative_g, ads_index_g


def _sample_mass_check(found: Findings, number: dict[str, Numbers],
                       group_value: dict[str, FloatArray], unit: _RowUnits, gid: IntArray,
                       n_groups: int) -> None:
    """An isotherm whose loading (or sigma) is an absolute amount needs a sample mass."""
    sigma_given = number["loading_sigma"].problem == OK
    absolute_g = np.zeros(n_groups, dtype=bool)
    for index, unit_name in enumerate(unit.loading_units):
        if not units.LOADING_UNIT_TABLE[unit_name].per_kg_sorbent:
            absolute_g[np.unique(gid[(unit.loading == index)
                                     | (sigma_given & (unit.loading_sigma == index))])] = True
    found.groups_where(absolute_g & np.isnan(group_value["sample_mass_g"]), "sample_mass_g",
                       "missing_sample_mass",
                       lambda g: "the loading unit is an absolute amount; 'sample_mass_g' is needed "
                                 "to express it per mass of sorbent")


def _canonical_points(found: Findings, number: dict[str, Numbers], unit: _RowUnits,
                      p0_g: FloatArray, molar_mass: FloatArray,
                      group_value: dict[str, FloatArray], gid: IntArray, n_groups: int) -> Points:
    """Every point in Pa and mol/kg, sorted per isotherm by pressure, after recording
    the values above their physical bounds (``out_of_range``)."""
    mass_g = group_value["sample_mass_g"]
    l_table = unit.loading_units
    with np.errstate(all="ignore"):
        pressure_pa = number["pressure"].value * np.where(unit.is_relative, p0_g[gid],
                                                          unit.pa_per_unit)
        loading = loading_in_mol_per_kg(number["loading"].value, unit.loading, l_table,
                                        molar_mass, mass_g[gid])
        sigma = loading_in_mol_per_kg(number["loading_sigma"].value, unit.loading_sigma, l_table,
                                      molar_mass, mass_g[gid])
    unit_names = {"pressure": (unit.pressure_units, unit.pressure),
                  "saturation_pressure": (unit.pressure_units, unit.saturation_pressure),
                  "loading": (l_table, unit.loading),
                  "loading_sigma": (l_table, unit.loading_sigma)}
    range_checks(found, number, unit_names, {
        "temperature_k": (number["temperature_k"].value, "K", units.MAX_TEMPERATURE_K),
        "pressure": (pressure_pa, "Pa", units.MAX_PRESSURE_PA),
        "saturation_pressure": (unit.p0_row, "Pa", units.MAX_PRESSURE_PA),
        "loading": (loading, "mol/kg", units.MAX_LOADING_MOL_PER_KG),
        "loading_sigma": (sigma, "mol/kg", units.MAX_LOADING_MOL_PER_KG),
        "surface_area_m2_per_g": (number["surface_area_m2_per_g"].value, "m2/g",
                                  units.MAX_SURFACE_AREA_M2_PER_G)})
    return sorted_points(gid, n_groups, pressure_pa, loading, sigma)


def _add_accepted(batch: Batch, build: Accepted, accepted: IntArray, names: GroupNames,
                  label: str) -> None:
    """Append one Isotherm per accepted group; one that cannot be built, or whose derived
    id repeats an earlier one, is rejected instead."""
    seen_ids: set[str] = set()
    for g in accepted:
        try:
            iso = build.isotherm(int(g))
        except Exception as exc:  # noqa: BLE001 - one isotherm's bug must not sink the batch
            batch.rejected.append(issue(label, names[g], None, None, "internal_error",
                                        f"could not be built ({type(exc).__name__}: {short(exc)})"))
            continue
        if iso.isotherm_id in seen_ids:
            batch.rejected.append(issue(label, iso.isotherm_id, None, "isotherm_id",
                                        "duplicate_isotherm_id",
                                        "an earlier isotherm has the same content and derived id"))
            continue
        seen_ids.add(iso.isotherm_id)
        batch.isotherms.append(iso)
