"""CSV cells that read back to the values written: the one encoder of every CSV
sorbrank writes (the API's exports, ``sorbrank fit --format csv``) and its decoder.

No Flask and no service import, so the command line, the API and the Python API
share it. docs/formats.md ("Exports") is the user's description; the rules:

* **null and NaN**: an empty, unquoted cell (what PostgreSQL's ``COPY ... (FORMAT
  csv)`` reads as NULL). CSV has one "no value" marker; both end there.
* **floats**: ``repr``, the shortest text that reads back to the same double
  (Python's float repr); ``Infinity`` / ``-Infinity`` for the infinities, the
  spelling PostgreSQL's float8 input documents (section 8.1.3, "Floating-Point
  Types", case-insensitive) and Python's ``float()`` also reads.
* **integers** in decimal; **booleans** ``true`` / ``false``; **timestamps** ISO
  8601 in UTC with microseconds and ``Z`` (a timestamp without a zone is UTC).
* **lists**: a PostgreSQL array literal ``{a,b}`` (section 8.15.6, "Array Input
  and Output Syntax"), so a file loads by ``COPY`` into array columns and a list
  can never be mistaken for text: an element is written in double quotes, with
  ``\\`` before each ``"`` and ``\\``, when it is empty, spells NULL (any case),
  or holds ``,`` ``{`` ``}`` ``"`` ``\\`` or whitespace; a null (or NaN) element
  is ``NULL``. Nested lists nest (``{{1,2},{3}}``).
* **text** as it is, with one exception, the spreadsheet-formula guard: text that
  starts with = + - @ tab or CR (after any leading apostrophes), and is not a
  plain number, gets one more leading apostrophe, so a spreadsheet shows it as
  text instead of running it. The decoder takes that apostrophe off again, so
  the guard is reversible. Ids never need it: intake refuses an id the guard
  would change (``formula_problem``, issue code ``formula_start``), so ids are
  byte-identical in JSON, CSV, Parquet and Arrow.
* **structs** (mappings) as JSON text.

A cell is put in double quotes (``""`` inside) when it holds the delimiter, a
quote, CR or LF, or is the empty string, so an empty text ("") and a null
(empty cell) stay apart, as they do for PostgreSQL's CSV COPY.
"""
from __future__ import annotations

import io
import json
import math
import re
from datetime import date, datetime, timezone
from typing import IO, TYPE_CHECKING, Any, Iterable, Iterator, Union

if TYPE_CHECKING:  # imported where used: pyarrow loads only when a table is encoded
    import pyarrow as pa

FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
_PLAIN_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_QUOTE_CELL = re.compile(r'[,"\r\n]')
# PostgreSQL's array_in splits on these (array_isspace: space, \t, \n, \r, \v, \f) and
# braces, commas, quotes and backslashes; any other whitespace is quoted too, harmless
_QUOTE_ELEMENT = re.compile(r'[,{}"\\\s]')
INFINITY, MINUS_INFINITY = "Infinity", "-Infinity"

# an element of a parsed array literal: text, None for NULL, a nested array
ArrayItem = Union[str, None, list["ArrayItem"]]


def formula_problem(text: str) -> str | None:
    """Why ``text`` cannot be an id because the formula guard would rewrite it in CSV,
    or None. Intake refuses such ids; exports then never alter one."""
    rest = text.lstrip("'")
    if rest[:1] and rest[:1] in FORMULA_START:
        start = text[: len(text) - len(rest) + 1]
        return (f"begins with {start!r}, which spreadsheets run as a formula; CSV exports "
                "would have to prefix it with an apostrophe, so the id would differ between "
                "formats (start it with a letter or digit)")
    return None


def guard_text(text: str) -> str:
    """``text`` as a CSV cell: one apostrophe more where a spreadsheet would run it."""
    if text.lstrip("'")[:1] in FORMULA_START and not _PLAIN_NUMBER.match(text):
        return "'" + text
    return text


def unguard_text(cell: str) -> str:
    """The text ``guard_text`` was given (the apostrophe it added taken off)."""
    if cell[:1] == "'" and cell[1:].lstrip("'")[:1] in FORMULA_START:
        return cell[1:]
    return cell


def float_text(value: float) -> str | None:
    """Shortest round-trip text of a float; None for NaN (no value)."""
    if math.isnan(value):
        return None
    if math.isinf(value):
        return INFINITY if value > 0 else MINUS_INFINITY
    return repr(value)


def timestamp_text(moment: datetime) -> str:
    if moment.tzinfo is None:  # Arrow timestamps without a zone hold UTC
        moment = moment.replace(tzinfo=timezone.utc)
    return moment.astimezone(timezone.utc).isoformat(timespec="microseconds").replace(
        "+00:00", "Z")


def cell_text(value: Any) -> str | None:
    """The text of one cell before CSV quoting; None for no value (null, NaN)."""
    if value is None:
        return None
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return float_text(value)
    if isinstance(value, int):
        return str(value)
    if isinstance(value, datetime):
        return timestamp_text(value)
    if isinstance(value, date):
        return value.isoformat()
    if isinstance(value, (list, tuple)):
        return array_literal(value)
    if isinstance(value, dict):
        return json.dumps(value, allow_nan=False, default=str)
    return guard_text(str(value))


def array_literal(values: Iterable[Any]) -> str:
    """A PostgreSQL array literal of ``values`` (see the module docstring)."""
    return "{" + ",".join(_element(v) for v in values) + "}"


def _element(value: Any) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "NULL"
    if isinstance(value, (list, tuple)):
        return array_literal(value)
    if isinstance(value, str):
        text = value
    else:
        encoded = cell_text(value)
        if encoded is None:
            return "NULL"
        if not isinstance(value, dict):
            return encoded  # numbers, booleans and timestamps need no quotes
        text = encoded
    if text == "" or text.upper() == "NULL" or _QUOTE_ELEMENT.search(text):
        return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'
    return text


def csv_field(text: str | None) -> str:
    """One cell of ``cell_text`` as it goes in the file (RFC 4180 quoting)."""
    if text is None:
        return ""
    if text == "" or _QUOTE_CELL.search(text):
        return '"' + text.replace('"', '""') + '"'
    return text


def csv_lines(column_names: list[str],
              batches: Iterable[pa.RecordBatch | pa.Table]) -> Iterator[str]:
    """The header line, then one line per row of ``batches`` (pyarrow record batches
    or tables), each ending in LF."""
    yield ",".join(csv_field(guard_text(str(name))) for name in column_names) + "\n"
    for batch in batches:
        columns = [column_fields(column) for column in batch.columns]
        if columns:
            yield "".join(",".join(row) + "\n" for row in zip(*columns))


_FLOAT_SPECIAL = {"nan": "", "inf": INFINITY, "-inf": MINUS_INFINITY}


def column_fields(column: pa.Array | pa.ChunkedArray) -> list[str]:
    """The CSV fields of one pyarrow array, row by row: ``csv_field(cell_text(v))``
    for each value, with a shortcut for float columns (most of every export)."""
    import pyarrow as pa

    values = column.to_pylist()
    if pa.types.is_floating(column.type):
        # repr never holds a comma or a quote; only nan and the infinities change
        fields = ["" if v is None else repr(v) for v in values]
        return [_FLOAT_SPECIAL.get(f, f) for f in fields]
    return [csv_field(cell_text(v)) for v in values]


def write_csv(table: pa.Table, out: IO[str], chunk_rows: int = 10_000) -> None:
    """Write a pyarrow Table as CSV to the text stream ``out``."""
    for text in csv_lines(table.column_names, table.to_batches(max_chunksize=chunk_rows)):
        out.write(text)


def csv_bytes(table: pa.Table) -> bytes:
    """A pyarrow Table as CSV, UTF-8."""
    out = io.StringIO()
    write_csv(table, out)
    return out.getvalue().encode()


# ---------------------------------------------------------------------------
# reading back

def parse_array(text: str) -> list[ArrayItem]:
    """The elements of a PostgreSQL array literal: text, None for NULL, lists for
    nested arrays. Raises ValueError for text that is not one."""
    items, end = _parse_array(text, 0)
    if text[end:].strip():
        raise ValueError(f"text after the array literal: {text!r}")
    return items


def _parse_array(text: str, i: int) -> tuple[list[ArrayItem], int]:
    i = _skip_space(text, i)
    if i >= len(text) or text[i] != "{":
        raise ValueError(f"an array literal starts with '{{': {text!r}")
    i = _skip_space(text, i + 1)
    items: list[ArrayItem] = []
    if i < len(text) and text[i] == "}":
        return items, i + 1
    while True:
        i = _skip_space(text, i)
        if i >= len(text):
            raise ValueError(f"unterminated array literal: {text!r}")
        if text[i] == "{":
            nested, i = _parse_array(text, i)
            items.append(nested)
        else:
            element, i = _parse_element(text, i)
            items.append(element)
        i = _skip_space(text, i)
        if i >= len(text):
            raise ValueError(f"unterminated array literal: {text!r}")
        if text[i] == ",":
            i += 1
            continue
        if text[i] == "}":
            return items, i + 1
        raise ValueError(f"unexpected {text[i]!r} at {i} in array literal {text!r}")


def _parse_element(text: str, i: int) -> tuple[str | None, int]:
    out: list[str] = []
    quoted_any = False
    trailing = 0  # unquoted, unescaped whitespace at the end is not part of it
    while i < len(text):
        ch = text[i]
        if ch == '"':
            quoted_any, i = True, i + 1
            while i < len(text) and text[i] != '"':
                if text[i] == "\\":
                    i += 1
                if i >= len(text):
                    raise ValueError(f"unterminated quote in array literal {text!r}")
                out.append(text[i])
                i += 1
            if i >= len(text):
                raise ValueError(f"unterminated quote in array literal {text!r}")
            i += 1
            trailing = 0
        elif ch == "\\":
            if i + 1 >= len(text):
                raise ValueError(f"dangling backslash in array literal {text!r}")
            out.append(text[i + 1])
            i += 2
            trailing = 0
        elif ch in ",}":
            break
        elif ch == "{":
            raise ValueError(f"unexpected '{{' inside an element of {text!r}")
        else:
            out.append(ch)
            trailing = trailing + 1 if ch in _ARRAY_SPACE else 0
            i += 1
    value = "".join(out[: len(out) - trailing] if trailing else out)
    if not quoted_any and value.upper() == "NULL":
        return None, i
    return value, i


_ARRAY_SPACE = " \t\n\r\v\f"


def _skip_space(text: str, i: int) -> int:
    while i < len(text) and text[i] in _ARRAY_SPACE:
        i += 1
    return i


def parse_float(text: str) -> float:
    """A float cell or element: repr text, Infinity / -Infinity (any case), NaN."""
    return float(text)


def decode_cell(cell: str, arrow_type: pa.DataType) -> Any:
    """The value an exported cell holds, for a column of ``arrow_type`` (pyarrow).

    ``cell`` is the field as the ``csv`` module returns it. An empty field is None:
    that module cannot tell ``""`` (the empty text) from an empty cell (null), which
    PostgreSQL's COPY does; sorbrank's text columns hold no empty text. NaN reads
    as None.
    """
    import pyarrow as pa

    if cell == "":
        return None
    if pa.types.is_dictionary(arrow_type):
        arrow_type = arrow_type.value_type
    if pa.types.is_list(arrow_type) or pa.types.is_large_list(arrow_type):
        return [_decode_element(e, arrow_type.value_type) for e in parse_array(cell)]
    if pa.types.is_string(arrow_type) or pa.types.is_large_string(arrow_type):
        return unguard_text(cell)
    return _decode_scalar(cell, arrow_type)


def _decode_element(element: ArrayItem, arrow_type: pa.DataType) -> Any:
    import pyarrow as pa

    if element is None:
        return None
    if isinstance(element, list):
        return [_decode_element(e, arrow_type.value_type) for e in element]
    if pa.types.is_string(arrow_type) or pa.types.is_large_string(arrow_type):
        return element
    return _decode_scalar(element, arrow_type)


def _decode_scalar(text: str, arrow_type: pa.DataType) -> Any:
    import pyarrow as pa

    if pa.types.is_boolean(arrow_type):
        if text not in ("true", "false"):
            raise ValueError(f"not a boolean: {text!r}")
        return text == "true"
    if pa.types.is_integer(arrow_type):
        return int(text)
    if pa.types.is_floating(arrow_type):
        value = parse_float(text)
        return None if math.isnan(value) else value
    if pa.types.is_timestamp(arrow_type):
        moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
        return moment if arrow_type.tz is not None else moment.replace(tzinfo=None)
    if pa.types.is_date(arrow_type):
        return date.fromisoformat(text)
    if pa.types.is_struct(arrow_type) or pa.types.is_map(arrow_type):
        return json.loads(text)
    if pa.types.is_null(arrow_type):
        raise ValueError(f"a column of type null holds {text!r}")
    return text
