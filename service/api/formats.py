"""Tables out as JSON, CSV, Parquet or an Arrow IPC stream."""
from __future__ import annotations

import io
import math
from typing import Iterator

import pyarrow as pa
import pyarrow.parquet as pq
from flask import Response, request

from sorbrank.worker import csvcodec
from sorbrank.worker.store import nan_to_none

from ..problems import Problem

MEDIA_TYPES = {
    "json": "application/json",
    "csv": "text/csv",
    "parquet": "application/vnd.apache.parquet",
    "arrow": "application/vnd.apache.arrow.stream",
}
FORMATS = tuple(MEDIA_TYPES)


def negotiate() -> str:
    """The response format: ?format= wins, then the Accept header, then JSON."""
    wanted = request.args.get("format")
    if wanted is not None:
        if wanted not in MEDIA_TYPES:
            raise Problem(400, "Bad Request", f"format={wanted!r}: choose one of "
                          + ", ".join(FORMATS), slug="bad-parameter", parameter="format")
        return wanted
    if not request.headers.get("Accept"):
        return "json"
    best = request.accept_mimetypes.best_match(list(MEDIA_TYPES.values()))
    if best is None:
        raise Problem(406, "Not Acceptable", "this resource is available as "
                      + ", ".join(MEDIA_TYPES.values()))
    return next(fmt for fmt, media in MEDIA_TYPES.items() if media == best)


def json_rows(table: pa.Table) -> list[dict]:
    return nan_to_none(table.to_pylist())


def safe_cell(value) -> str:
    """One CSV cell's text (before CSV quoting), by the one export encoding of
    ``sorbrank.worker.csvcodec``: lists as PostgreSQL array literals ``{a,b}``,
    floats as their shortest round-trip repr, null and NaN as empty, and text a
    spreadsheet would run as a formula (= + - @ tab CR) behind an apostrophe.
    Numbers stay numbers (a negative value is not a formula)."""
    text = csvcodec.cell_text(value)
    return "" if text is None else text


def to_csv(table: pa.Table) -> bytes:
    return csvcodec.csv_bytes(table)


def csv_chunks(column_names: list[str], batches) -> Iterator[str]:
    """The CSV of ``to_csv`` piece by piece (header first), for streamed exports."""
    return csvcodec.csv_lines(column_names, batches)


def to_parquet(table: pa.Table) -> bytes:
    sink = io.BytesIO()
    pq.write_table(table, sink)
    return sink.getvalue()


def to_arrow_stream(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def table_response(table: pa.Table, fmt: str, name: str, headers: dict | None = None) -> Response:
    """A tabular (non-JSON) response; ``name`` becomes the download file name."""
    body = {"csv": to_csv, "parquet": to_parquet, "arrow": to_arrow_stream}[fmt](table)
    extension = {"csv": "csv", "parquet": "parquet", "arrow": "arrows"}[fmt]
    # Werkzeug adds "; charset=utf-8" to text/* media types itself
    resp = Response(body, mimetype=MEDIA_TYPES[fmt])
    resp.headers["Content-Disposition"] = f'attachment; filename="{name}.{extension}"'
    resp.headers.update(headers or {})
    return resp


def int_arg(name: str, default: int, low: int, high: int) -> int:
    raw = request.args.get(name)
    if raw is None:
        return default
    try:
        value = int(raw)
    except ValueError:
        value = None
    if value is None or not low <= value <= high:
        raise Problem(400, "Bad Request", f"{name}={raw!r}: expected a whole number "
                      f"from {low} to {high}", slug="bad-parameter", parameter=name)
    return value


def float_arg(name: str, default: float | None) -> float | None:
    raw = request.args.get(name)
    if raw is None:
        return default
    try:
        value = float(raw)
    except ValueError:
        value = math.nan
    if not math.isfinite(value):
        raise Problem(400, "Bad Request", f"{name}={raw!r}: expected a finite number",
                      slug="bad-parameter", parameter=name)
    return value


def bool_arg(name: str) -> bool:
    raw = request.args.get(name, "false").lower()
    if raw not in ("true", "false", "1", "0"):
        raise Problem(400, "Bad Request", f"{name}={raw!r}: expected true or false",
                      slug="bad-parameter", parameter=name)
    return raw in ("true", "1")


def choice_arg(name: str, default: str, choices: tuple[str, ...]) -> str:
    raw = request.args.get(name, default)
    if raw not in choices:
        raise Problem(400, "Bad Request", f"{name}={raw!r}: choose one of {', '.join(choices)}",
                      slug="bad-parameter", parameter=name)
    return raw
