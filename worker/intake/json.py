"""The JSON reader: one object per isotherm, arrays for the points; conditions and
mixtures are handed on raw in ``Rows.requests`` and read by conditions.py.
"""
from __future__ import annotations

import json
import math
from collections.abc import Callable
from typing import Any

import numpy as np

from .. import units
from ..arrays import FloatArray, IntArray
from .issues import batch_error, nearest, old_spelling, short
from .rows import (
    BLANK,
    MISSING,
    NOT_FINITE,
    NOT_NUMBER,
    OK,
    OLD_SPELLINGS,
    SETTINGS,
    TEXT_FIELDS,
    UNIT_FIELD,
    WRONG_TYPE,
    Limits,
    Numbers,
    Rows,
    Text,
)
from .source import Reader, decoded, id_problem, register_reader


def parsed_json(text: str, label: str, limits: Limits) -> dict[str, Any]:
    if len(text) > limits.max_json_bytes:  # characters >= bytes / 4: a cheap, safe bound first
        raise batch_error(label, "input_too_large",
                           f"a JSON batch may hold at most {limits.max_json_bytes} bytes "
                           f"(this one holds at least {len(text)} characters); send large "
                           "batches as Parquet or CSV, which are read column-wise")
    check_depth(text, label, limits.max_json_depth)
    try:
        doc = json.loads(text)
    except (ValueError, RecursionError) as exc:
        raise batch_error(label, "unparseable", f"JSON cannot be parsed: {short(exc, 200)}")
    if not isinstance(doc, dict):
        raise batch_error(label, "wrong_type", "the JSON document must be an object")
    allowed = ("batch_label", "units", "sample_mass_g", "gases", "isotherms", "conditions", "mixtures")
    for key in doc:
        if key in OLD_SPELLINGS:
            raise old_spelling(key, "top-level key", label)
        if key not in allowed:
            near = nearest(key, allowed)
            raise batch_error(label, "unknown_field", f"unknown top-level key {short(key)!r}"
                               + (f"; did you mean {near!r}?" if near else ""), fld=short(key))
    if not isinstance(doc.get("isotherms"), list):
        raise batch_error(label, "wrong_type" if "isotherms" in doc else "missing_column",
                           "'isotherms' must be a list of isotherm objects", fld="isotherms")
    return doc


def check_depth(text: str, label: str, max_depth: int) -> None:
    """Refuse nesting deeper than ``max_depth`` before the parser recurses."""
    brackets = np.frombuffer(text.encode("utf-8"), dtype=np.uint8)
    opening = (brackets == ord("[")) | (brackets == ord("{"))
    closing = (brackets == ord("]")) | (brackets == ord("}"))
    if not opening.any():
        return
    # brackets inside strings count too, so this is an upper bound on depth;
    # the schema never needs more than a handful of levels
    depth = np.cumsum(opening.astype(np.int64) - closing.astype(np.int64))
    if depth.max() > max_depth:
        raise batch_error(label, "too_deeply_nested",
                           f"JSON nests deeper than {max_depth} levels")


def rows_from_json(doc: dict[str, Any], label: str, limits: Limits) -> Rows:
    items = doc["isotherms"]
    if len(items) > limits.max_isotherms:
        raise batch_error(label, "too_many_isotherms",
                           f"{len(items)} isotherms, limit {limits.max_isotherms}")
    if not items:
        raise batch_error(label, "no_data", "'isotherms' is empty")
    builder = JsonRows(limits, label)
    for index, item in enumerate(items):
        builder.add(index, item)
    rows = builder.rows()
    rows.settings = {key: doc[key] for key in SETTINGS if doc.get(key) is not None}
    rows.requests = {key: doc.get(key) for key in ("conditions", "mixtures")}
    return rows


def json_number(value: Any) -> tuple[float, int]:
    if value is None:
        return math.nan, MISSING
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return math.nan, NOT_NUMBER
    try:
        number = float(value)
    except OverflowError:
        return math.nan, NOT_FINITE
    return (number, OK) if math.isfinite(number) else (math.nan, NOT_FINITE)


def json_numbers(values: list[Any]) -> tuple[FloatArray, IntArray]:
    if set(map(type, values)) <= {int, float}:  # bool is excluded: its type is bool
        try:
            array = np.array(values, dtype=float)
            problem = np.where(np.isfinite(array), OK, NOT_FINITE).astype(np.int8)
            return np.where(problem == OK, array, np.nan), problem
        except OverflowError:
            pass
    pairs = [json_number(v) for v in values]
    return (np.array([p[0] for p in pairs], dtype=float),
            np.array([p[1] for p in pairs], dtype=np.int8))


class JsonRows:
    """Accumulates JSON isotherm objects into the column-wise Rows form.

    Isotherm-level values are kept once per isotherm and repeated over its
    points at the end, so the work per point stays inside numpy. Each isotherm
    names its own pressure/loading keys, so each may carry its own units.
    """

    SCALAR_NUMBERS = ("temperature_k", "saturation_pressure", "sample_mass_g", "surface_area_m2_per_g")
    ARRAYS = ("pressure", "loading", "loading_sigma")
    UNIT_TEXT = tuple(UNIT_FIELD.values())

    def __init__(self, limits: Limits, label: str) -> None:
        self.limits = limits
        self.label = label
        self.total_points = 0
        self.text_fields = TEXT_FIELDS + self.UNIT_TEXT
        self.text_code: dict[str, list[int]] = {f: [] for f in self.text_fields}
        self.text_values: dict[str, dict[str, int]] = {f: {} for f in self.text_fields}
        self.scalar: dict[str, list[tuple[float, int]]] = {f: [] for f in self.SCALAR_NUMBERS}
        self.scalar_raw: dict[str, list[Any]] = {f: [] for f in self.SCALAR_NUMBERS}
        self.array: dict[str, list[tuple[FloatArray, IntArray]]] = {f: [] for f in self.ARRAYS}
        self.array_raw: dict[str, list[list[Any]]] = {f: [] for f in self.ARRAYS}
        self.n_points: list[int] = []
        self.names: list[str] = []
        self.column_names: list[dict[str, str]] = []
        self.issues: list[tuple[int, str | None, str, str]] = []

    def _quantity_keys(self, index: int, item: dict[str, Any]) -> tuple[dict[str, str], dict[str, str]]:
        """Per quantity: the key this isotherm uses, and the unit its name carries."""
        keys: dict[str, str] = {}
        key_units: dict[str, str] = {}
        for key in item:
            name = str(key).strip().lower()
            if name in OLD_SPELLINGS and name != "defaults":
                self.issues.append((index, name, "old_spelling",
                                    f"{name!r} is no longer read: use {OLD_SPELLINGS[name]}"))
                continue
            try:
                found = units.unit_column(name)
            except units.UnknownColumnUnit as exc:
                self.issues.append((index, exc.column, "unknown_unit", str(exc)))
                continue
            if found is None:
                continue
            quantity, unit = found
            if quantity in keys:
                self.issues.append((index, quantity, "conflicting_columns",
                                    f"keys {keys[quantity]!r} and {key!r} both give the "
                                    f"{quantity.replace('_', ' ')}; keep one"))
                continue
            keys[quantity] = key
            if unit is not None:
                key_units[quantity] = unit
        return keys, key_units

    def _own_units(self, index: int, item: dict[str, Any]) -> dict[str, str]:
        raw = item.get("units")
        if raw is None:
            return {}
        try:
            return units.parse_units_declaration(raw)
        except ValueError as exc:
            code = "unknown_unit" if isinstance(exc, units.UnknownUnit) else "wrong_type"
            self.issues.append((index, "units", code, f"'units': {exc}"))
            return {}

    def add(self, index: int, item: Any) -> None:
        name = f"isotherms[{index}]"
        if isinstance(item, dict):
            given = item.get("isotherm_id")
            if isinstance(given, str) and given.strip() and id_problem(given.strip()) is None:
                name = given.strip()
        self.names.append(name)
        if not isinstance(item, dict):
            self.issues.append((index, None, "wrong_type", "an isotherm must be a JSON object"))
            item = {"pressure": [], "loading": []}  # nothing more to report about it
        keys, key_units = self._quantity_keys(index, item)
        self.column_names.append(dict(keys))
        own_units = {**self._own_units(index, item), **key_units}
        arrays = {q: self._array(index, q, keys.get(q), item) for q in self.ARRAYS}
        pressure_key = keys.get("pressure", "pressure")
        pressures = arrays["pressure"] or []    # only loading_sigma is ever None
        n = min(len(pressures), len(arrays["loading"] or []))
        for q in ("loading", "loading_sigma"):
            given = arrays[q]
            if given is not None and len(given) != len(pressures):
                self.issues.append((index, q, "length_mismatch",
                                    f"{keys.get(q, q)!r} has {len(given)} values, "
                                    f"{pressure_key!r} has {len(pressures)}"))
        sigmas = arrays["loading_sigma"]
        if sigmas is not None:
            n = min(n, len(sigmas))
        if n > self.limits.max_points_per_isotherm:
            self.issues.append((index, None, "too_many_points",
                                f"{n} points, limit {self.limits.max_points_per_isotherm}"))
            n = 0
        self.n_points.append(n)
        self.total_points += n
        if self.total_points > self.limits.max_rows:
            raise batch_error(self.label, "input_too_large", f"the isotherms hold more than "
                               f"{self.limits.max_rows} points, limit {self.limits.max_rows}")
        for key in TEXT_FIELDS:
            self.text_code[key].append(self._text_code(index, key, item.get(key)))
        for quantity, fld in UNIT_FIELD.items():
            unit = own_units.get(quantity)
            self.text_code[fld].append(BLANK if unit is None else
                                       self.text_values[fld].setdefault(unit, len(self.text_values[fld])))
        for key in self.SCALAR_NUMBERS:
            value = item.get(keys.get(key, key))
            self.scalar[key].append(json_number(value))
            self.scalar_raw[key].append(value)
        for key in self.ARRAYS:
            values = arrays[key]
            if values is None:  # optional sigma absent: every point missing
                values = [None] * n
                self.array[key].append((np.full(n, np.nan), np.full(n, MISSING, dtype=np.int8)))
            else:
                values = values[:n]
                self.array[key].append(json_numbers(values))
            self.array_raw[key].append(values)

    def _array(self, index: int, quantity: str, key: str | None, item: dict[str, Any]
               ) -> list[Any] | None:
        value = item.get(key) if key is not None else None
        if isinstance(value, list):
            return value
        if value is None:
            if quantity == "loading_sigma":
                return None
            example = "pressure_kpa" if quantity == "pressure" else "loading_mmol_per_g"
            self.issues.append((index, quantity, "missing_value",
                                f"{key or quantity!r} is missing (a list of numbers, e.g. "
                                f"{example!r}, or {quantity!r} with units)"))
        else:
            self.issues.append((index, quantity, "wrong_type", f"{key!r} must be a list of numbers"))
        return None if quantity == "loading_sigma" else []

    def _text_code(self, index: int, key: str, value: Any) -> int:
        if value is None:
            return BLANK
        if isinstance(value, int) and not isinstance(value, bool):
            value = str(value)
        if not isinstance(value, str):
            self.issues.append((index, key, "wrong_type", f"{key!r} must be text"))
            return WRONG_TYPE
        value = value.strip()
        if not value:
            return BLANK
        return self.text_values[key].setdefault(value, len(self.text_values[key]))

    def rows(self) -> Rows:
        counts = np.array(self.n_points, dtype=np.int64)
        group = np.repeat(np.arange(counts.size), counts)
        point = np.arange(group.size) - np.repeat(np.cumsum(counts) - counts, counts)
        text = {k: Text(np.repeat(np.array(self.text_code[k], dtype=np.int64), counts),
                         list(self.text_values[k])) for k in self.text_fields}

        def scalar_as_sent(raw: list[Any]) -> Callable[[int], str]:
            return lambda i: json_text(raw[group[i]])

        def point_as_sent(raw: list[list[Any]]) -> Callable[[int], str]:
            return lambda i: json_text(raw[group[i]][point[i]])

        numbers = {}
        for k in self.SCALAR_NUMBERS:
            pairs = self.scalar[k]
            numbers[k] = Numbers(
                np.repeat(np.array([v for v, _ in pairs], dtype=float), counts),
                np.repeat(np.array([c for _, c in pairs], dtype=np.int8), counts),
                scalar_as_sent(self.scalar_raw[k]))
        for k in self.ARRAYS:
            parts = self.array[k]
            numbers[k] = Numbers(
                np.concatenate([v for v, _ in parts]) if parts else np.empty(0),
                np.concatenate([c for _, c in parts]) if parts else np.empty(0, np.int8),
                point_as_sent(self.array_raw[k]))
        return Rows(source="json", n_rows=int(group.size), text=text, numbers=numbers,
                     row_label=point, group=group, n_groups=len(self.names), group_names=self.names,
                     isotherm_level=frozenset(TEXT_FIELDS + self.SCALAR_NUMBERS + self.UNIT_TEXT),
                     group_issues=self.issues, group_column_names=self.column_names)


def json_text(value: Any) -> str:
    """A JSON value as the sender wrote it (floats as Python prints NaN/inf)."""
    try:
        return short(repr(value) if isinstance(value, float) else json.dumps(value))
    except (ValueError, RecursionError):
        return "(unprintable value)"


def read_json(data: bytes, label: str, limits: Limits, options: dict[str, Any]) -> Rows:
    return rows_from_json(parsed_json(decoded(data, label), label, limits), label, limits)


register_reader(Reader("json", read_json, suffixes=(".json",),
                       sniff=lambda data: data.lstrip()[:1] == b"{"))
