"""The pyarrow.Table reader, and the column mapping and Arrow-to-``Rows`` conversion
that the CSV and Parquet readers share.
"""
from __future__ import annotations

import json
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .. import units
from .issues import batch_error, nearest, old_spelling
from .rows import (
    BLANK,
    IDENTITY_COLUMNS,
    MISSING,
    NOT_FINITE,
    NOT_NUMBER,
    OK,
    OLD_SPELLINGS,
    PLAIN_COLUMNS,
    REQUIRED_QUANTITIES,
    SETTINGS,
    TEXT_FIELDS,
    UNIT_FIELD,
    Limits,
    Numbers,
    Rows,
    Text,
)
from .source import Reader, register_reader

FINITE_NUMBER_RE = r"^[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?$"


NON_FINITE_RE = r"(?i)^[+-]?(nan|inf|infinity)$"


def known_columns(names: list[str], label: str,
                   limits: Limits) -> tuple[dict[str, str], dict[str, str | None]]:
    """Map each known column (internal name) to its name in the input; and each
    quantity present to the unit its column name carries (None: plain)."""
    if len(names) > limits.max_columns:
        raise batch_error(label, "too_many_columns",
                           f"{len(names)} columns, limit {limits.max_columns}")
    found: dict[str, str] = {}
    column_units: dict[str, str | None] = {}
    for original in names:
        name = str(original).strip().lower()
        if name in OLD_SPELLINGS:
            raise old_spelling(name, "column", label)
        try:
            quantity = units.unit_column(name)
        except units.UnknownColumnUnit as exc:
            raise batch_error(label, "unknown_unit", str(exc), fld=exc.column)
        key = quantity[0] if quantity else name
        if quantity is None and name not in PLAIN_COLUMNS:
            continue
        if key in found:
            if str(found[key]).strip().lower() == name:
                raise batch_error(label, "duplicate_column", f"column {name!r} appears twice", fld=name)
            raise batch_error(label, "conflicting_columns",
                               f"columns {str(found[key]).strip()!r} and {str(original).strip()!r} "
                               f"both give the {key.replace('_', ' ')}; keep one", fld=key)
        found[key] = original
        if quantity:
            column_units[key] = quantity[1]
    missing = [c for c in IDENTITY_COLUMNS + REQUIRED_QUANTITIES if c not in found]
    if missing:
        present = [str(n).strip().lower() for n in names]
        hints = []
        for col in missing:
            near = nearest(col, [p for p in present if p not in found.values()])
            if col in REQUIRED_QUANTITIES:
                example = "pressure_kpa" if col == "pressure" else "loading_mmol_per_g"
                hints.append(f"a {col} column (e.g. {example}, or {col!r} with a units declaration)"
                             + (f" (found {near!r})" if near else ""))
            else:
                hints.append(f"{col!r}" + (f" (found {near!r})" if near else ""))
        raise batch_error(label, "missing_column", "missing required column(s): " + ", ".join(hints),
                           fld=missing[0])
    return found, column_units


def rows_from_table(table: pa.Table, columns: dict[str, str], column_units: dict[str, str | None],
                     source: str, label: str, decimal: str = ".") -> Rows:
    text: dict[str, Text] = {}
    numbers: dict[str, Numbers] = {}
    for name, original in columns.items():
        column = table.column(original).combine_chunks()
        if name in TEXT_FIELDS:
            text[name] = text_from_arrow(as_strings(column, name, label))
        elif pa.types.is_integer(column.type) or pa.types.is_floating(column.type) \
                or pa.types.is_decimal(column.type):
            numbers[name] = numbers_from_arrow_numeric(column)
        else:
            numbers[name] = numbers_from_strings(as_strings(column, name, label), decimal)
    n = table.num_rows
    for quantity, unit in column_units.items():
        # one unit per column: every row carries it (blank for a plain column)
        text[UNIT_FIELD[quantity]] = Text(np.full(n, BLANK if unit is None else 0, dtype=np.int64),
                                           [] if unit is None else [unit])
    return Rows(source=source, n_rows=n, text=text, numbers=numbers,
                 row_label=np.arange(1, n + 1),
                 column_names={k: str(v).strip() for k, v in columns.items()}, decimal=decimal)


def as_strings(column: pa.Array, name: str, label: str) -> pa.Array:
    if pa.types.is_dictionary(column.type):
        column = column.dictionary_decode()
    if not (pa.types.is_string(column.type) or pa.types.is_large_string(column.type)):
        try:
            column = pc.cast(column, pa.string())
        except pa.ArrowException:
            raise batch_error(label, "unsupported_column_type",
                               f"column {name!r} has type {column.type}, expected text or numbers",
                               fld=name)
    return pc.utf8_trim_whitespace(column.fill_null(""))


def text_from_arrow(strings: pa.Array) -> Text:
    encoded = pc.dictionary_encode(strings)
    values = encoded.dictionary.to_pylist()
    codes = encoded.indices.to_numpy(zero_copy_only=False).astype(np.int64)
    if "" in values:
        codes[codes == values.index("")] = BLANK
    return Text(codes, values)


def numbers_from_strings(strings: pa.Array, decimal: str = ".") -> Numbers:
    if decimal == ",":
        # a point in a decimal-comma file is not read: it may be a thousands separator
        with_point = pc.match_substring(strings, ".").to_numpy(zero_copy_only=False)
        strings_read = pc.if_else(pa.array(with_point), pa.scalar("?", pa.string()),
                                  pc.replace_substring(strings, ",", "."))
    else:
        strings_read = strings
    finite = pc.match_substring_regex(strings_read, FINITE_NUMBER_RE).to_numpy(zero_copy_only=False)
    parsed = pc.cast(pc.if_else(pa.array(finite), strings_read, pa.scalar(None, pa.string())),
                     pa.float64())
    value = parsed.to_numpy(zero_copy_only=False).astype(float)
    problem = np.full(len(strings), NOT_NUMBER, dtype=np.int8)
    if not finite.all():
        problem[pc.match_substring_regex(strings, NON_FINITE_RE).to_numpy(zero_copy_only=False)] = \
            NOT_FINITE
    problem[finite] = OK
    problem[finite & ~np.isfinite(value)] = NOT_FINITE          # e.g. 1e999
    problem[pc.equal(strings, "").to_numpy(zero_copy_only=False)] = MISSING
    value[problem != OK] = np.nan
    return Numbers(value, problem, lambda i: strings[i].as_py())


def numbers_from_arrow_numeric(column: pa.Array) -> Numbers:
    # unsafe: integers past 2**53 (up to 2**64) become the nearest float, which the range
    # checks then report by row, rather than the cast failing for the whole file
    value = pc.cast(column, pa.float64(), safe=False).to_numpy(zero_copy_only=False).astype(float)
    problem = np.zeros(len(value), dtype=np.int8)
    problem[~np.isfinite(value)] = NOT_FINITE
    problem[column.is_null().to_numpy(zero_copy_only=False)] = MISSING
    value[problem != OK] = np.nan
    return Numbers(value, problem, lambda i: column[i].as_py())


def rows_from_arrow_table(table: pa.Table, source: str, label: str, limits: Limits) -> Rows:
    """Rows of a Parquet file's table or of a pyarrow.Table handed over directly."""
    columns, column_units = known_columns(table.column_names, label, limits)
    for name, original in columns.items():
        kind = table.schema.field(original).type
        if pa.types.is_nested(kind) or pa.types.is_binary(kind):
            raise batch_error(label, "unsupported_column_type",
                               f"column {name!r} has type {kind}, expected text or numbers", fld=name)
    if table.num_rows == 0:
        raise batch_error(label, "no_data", "the table has no rows")
    if table.num_rows > limits.max_rows:
        raise batch_error(label, "input_too_large", f"the table holds {table.num_rows} rows, "
                           f"limit {limits.max_rows}")
    rows = rows_from_table(table, columns, column_units, source, label)
    metadata = table.schema.metadata or {}
    for key, value in metadata.items():
        name = key.decode("utf-8", "replace").strip().lower()
        text = value.decode("utf-8", "replace")
        if name in OLD_SPELLINGS:
            raise old_spelling(name, "metadata key", label)
        if name == "gases":
            try:
                rows.settings[name] = json.loads(text)
            except ValueError:
                raise batch_error(label, "invalid_gas", "metadata 'gases' must be a JSON list of "
                                   "gas objects", fld="gases")
        elif name in SETTINGS:
            rows.settings[name] = text
    return rows


def read_table(table: pa.Table, label: str, limits: Limits, options: dict[str, Any]) -> Rows:
    return rows_from_arrow_table(table, "table", label, limits)


register_reader(Reader("table", read_table, from_bytes=False))
