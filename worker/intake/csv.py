"""The CSV reader: leading ``# key: value`` settings, delimiter and decimal-mark
detection, then Arrow's CSV parser into the shared ``Rows`` form.
"""
from __future__ import annotations

import csv
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pcsv

from .. import units
from ..isotherm import IntakeError
from .issues import batch_error, old_spelling, short
from .rows import NUMBER_FIELDS, OLD_SPELLINGS, PLAIN_COLUMNS, Limits, Rows
from .source import Reader, decoded, register_reader
from .table import known_columns, rows_from_table

CSV_DELIMITERS = {",": "comma", ";": "semicolon", "\t": "tab"}


def checked_csv_options(delimiter: str | None, decimal: str | None, label: str) -> tuple[str | None, str | None]:
    """The CSV delimiter and decimal mark asked for (None: detect), checked."""
    names = {v: k for k, v in CSV_DELIMITERS.items()}
    if delimiter is not None:
        delimiter = names.get(str(delimiter).strip().lower(), delimiter)
        if delimiter == "\\t":
            delimiter = "\t"
        if delimiter not in CSV_DELIMITERS:
            raise batch_error(label, "invalid_setting", f"delimiter {short(delimiter)!r} is not one "
                               "of ',', ';', tab (or comma, semicolon, tab)", fld="delimiter")
    if decimal is not None:
        decimal = {"point": ".", "comma": ","}.get(str(decimal).strip().lower(), decimal)
        if decimal not in (".", ","):
            raise batch_error(label, "invalid_setting", f"decimal {short(decimal)!r} is not '.' or "
                               "',' (or point, comma)", fld="decimal")
        if decimal == "," and delimiter == ",":
            raise batch_error(label, "invalid_setting", "a decimal comma needs a delimiter other "
                               "than a comma (';' or tab)", fld="decimal")
    return delimiter, decimal


HEADER_SETTINGS = ("units", "sample_mass_g", "batch_label", "gas")


def split_comment_header(text: str, label: str) -> tuple[dict[str, Any], int]:
    """Settings from leading ``# key: value`` lines, and where the rest starts."""
    settings: dict[str, Any] = {}
    pos = 0
    while pos < len(text):
        end = text.find("\n", pos)
        end = len(text) if end < 0 else end + 1
        line = text[pos:end].strip()
        if line and not line.startswith("#"):
            break
        key, sep, value = line[1:].partition(":")
        key = key.strip().lower()
        # other comment lines are free text, and stay comments
        if sep and key in OLD_SPELLINGS:
            raise old_spelling(key, "header line '# " + key + ":'", label)
        if sep and key == "gas":
            settings.setdefault("gases", []).append(gas_line(value, label))
        elif sep and key in HEADER_SETTINGS:
            settings[key] = value.strip()
        pos = end
    return settings, pos


def gas_line(value: str, label: str) -> dict[str, Any]:
    """``CH3SH, molar_mass_g_per_mol=48.107, critical_temperature_k=470`` -> a gas dict."""
    name, *pairs = [part.strip() for part in value.split(",")]
    gas: dict[str, Any] = {"name": name}
    for pair in pairs:
        key, sep, number = pair.partition("=")
        if not sep:
            raise batch_error(label, "invalid_gas", f"header line '# gas:{short(value)}': "
                               f"{short(pair)!r} is not key=value (numbers in header lines use "
                               "a decimal point)", fld="gas")
        gas[key.strip().lower()] = number.strip()
    return gas


def csv_delimiter(header_line: str, given: str | None) -> str:
    """The delimiter asked for, else the one that splits the header into the most
    known columns (ties: the one that splits it most)."""
    if given is not None:
        return given
    return max(CSV_DELIMITERS, key=lambda d: (known_count(header_names(header_line, d)),
                                              header_line.count(d)))


def header_names(header_line: str, delimiter: str) -> list[str]:
    try:
        return next(csv.reader([header_line], delimiter=delimiter))
    except (csv.Error, StopIteration):
        return [header_line]


def known_count(names: list[str]) -> int:
    count = 0
    for name in names:
        key = str(name).strip().lower()
        try:
            count += key in PLAIN_COLUMNS or units.unit_column(key) is not None
        except units.UnitError:
            count += 1
    return count


def wrong_delimiter(header_line: str, delimiter: str, given: bool, label: str) -> IntakeError | None:
    """An error naming the delimiter the header seems to use, when that is why the
    required columns are missing; None when the split itself looks right."""
    others = {d: header_line.count(d) for d in (",", ";", "\t", "|")}
    seen = max(others, key=others.__getitem__)
    if others[seen] == 0 or seen == delimiter or others[seen] <= header_line.count(delimiter):
        return None
    def name(d: str) -> str:
        return CSV_DELIMITERS.get(d, repr(d))
    n_fields = len(header_names(header_line, delimiter))
    if given:
        expected = f"the delimiter asked for is a {name(delimiter)} ({delimiter!r})"
        advice = (f"give delimiter {seen!r} or leave it to detection" if seen in CSV_DELIMITERS
                  else "save the file comma-, semicolon- or tab-delimited")
    else:
        expected = "sorbrank reads comma-, semicolon- or tab-delimited files"
        advice = "save the file with one of those"
    return batch_error(label, "wrong_delimiter",
                        f"the header splits into {n_fields} column(s) on {delimiter!r} and lacks "
                        f"the required columns; it looks {name(seen)}-delimited ({others[seen]} x "
                        f"{seen!r} in the header), but {expected}: {advice}", fld="delimiter")


COMMA_NUMBER_RE = r"^\s*[+-]?([0-9]+,[0-9]*|,[0-9]+)([eE][+-]?[0-9]+)?\s*$"


POINT_NUMBER_RE = r"^\s*[+-]?([0-9]+\.[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?\s*$"


def csv_decimal(table: pa.Table, columns: dict[str, str], delimiter: str, given: str | None) -> str:
    """The decimal mark asked for, else "," when a non-comma-delimited file writes
    more of its numbers with a comma than with a point."""
    if given is not None:
        return given
    if delimiter == ",":
        return "."
    with_comma = with_point = 0
    for name, original in columns.items():
        if name in NUMBER_FIELDS:
            column = table.column(original)
            with_comma += pc.sum(pc.match_substring_regex(column, COMMA_NUMBER_RE)).as_py() or 0
            with_point += pc.sum(pc.match_substring_regex(column, POINT_NUMBER_RE)).as_py() or 0
    return "," if with_comma > with_point else "."


def rows_from_csv(data: bytes, text: str, label: str, limits: Limits,
                   delimiter: str | None, decimal: str | None) -> Rows:
    """``text`` is ``data`` decoded (checked UTF-8, BOM removed)."""
    settings, start = split_comment_header(text, label)
    header_end = text.find("\n", start)
    header_line = text[start:header_end if header_end >= 0 else len(text)].rstrip("\r\n")
    if not text[start:].strip():
        raise batch_error(label, "no_data", "no header and no data rows")
    if max(header_line.count(d) for d in CSV_DELIMITERS) + 1 > 4 * limits.max_columns:
        raise batch_error(label, "too_many_columns", f"more than {limits.max_columns} columns")
    chosen = csv_delimiter(header_line, delimiter)
    try:
        names = next(csv.reader([header_line], delimiter=chosen))
    except (csv.Error, StopIteration) as exc:
        raise batch_error(label, "unparseable", f"header cannot be read: {exc}")
    try:
        columns, column_units = known_columns(names, label, limits)
    except IntakeError as exc:
        if exc.issues[0].code == "missing_column":
            wrong = wrong_delimiter(header_line, chosen, delimiter is not None, label)
            if wrong is not None:
                raise wrong from None
        raise

    blank_skipped = [0]
    bad_rows: list[str] = []

    def on_invalid_row(row: pcsv.InvalidRow) -> str:
        if not row.text.strip():
            blank_skipped[0] += 1
            return "skip"
        data_row = (row.number or 0) - 1 - blank_skipped[0]
        bad_rows.append(f"data row {data_row} has {row.actual_columns} fields where the header "
                        f"has {row.expected_columns}: {short(row.text)!r}")
        return "error"

    bom = 3 if data.startswith(b"\xef\xbb\xbf") else 0
    body = pa.py_buffer(data)[bom + len(text[:start].encode("utf-8")):]  # zero-copy slice
    try:
        table = pcsv.read_csv(
            pa.BufferReader(body),
            # one block: a row never straddles blocks, whatever the header's length
            read_options=pcsv.ReadOptions(use_threads=False,
                                          block_size=max(1 << 20, min(body.size + 1, 1 << 30))),
            parse_options=pcsv.ParseOptions(delimiter=chosen, invalid_row_handler=on_invalid_row),
            convert_options=pcsv.ConvertOptions(
                column_types={original: pa.string() for original in columns.values()},
                include_columns=list(columns.values()),
                strings_can_be_null=False),
        )
    except (pa.ArrowException, ValueError) as exc:
        if bad_rows:
            raise batch_error(label, "malformed_row", bad_rows[0])
        raise batch_error(label, "unparseable", f"CSV cannot be parsed: {short(exc, 200)}")
    if table.num_rows == 0:
        raise batch_error(label, "no_data", "the file has a header but no data rows")
    if table.num_rows > limits.max_rows:
        raise batch_error(label, "input_too_large", f"the file holds {table.num_rows} rows, "
                           f"limit {limits.max_rows}")
    rows = rows_from_table(table, columns, column_units, "csv", label,
                            csv_decimal(table, columns, chosen, decimal))
    rows.settings = settings
    return rows


def read_csv(data: bytes, label: str, limits: Limits, options: dict[str, Any]) -> Rows:
    return rows_from_csv(data, decoded(data, label), label, limits, options["delimiter"],
                         options["decimal"])


register_reader(Reader("csv", read_csv, suffixes=(".csv",), fallback=True))
