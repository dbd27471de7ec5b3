"""The Parquet reader: the footer is checked against the limits before any data are
read, then the known columns go through the table reader.
"""
from __future__ import annotations

from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from .issues import batch_error, short
from .rows import Limits, Rows
from .source import Reader, register_reader
from .table import known_columns, rows_from_arrow_table


def rows_from_parquet(data: bytes, label: str, limits: Limits) -> Rows:
    """Rows of a Parquet file; its footer is checked against the limits first, since a
    few hundred KB of run-length-encoded data can hold tens of millions of rows."""
    try:
        parquet = pq.ParquetFile(pa.BufferReader(data))
        metadata, names = parquet.metadata, parquet.schema_arrow.names
    except Exception as exc:  # noqa: BLE001 - any reader failure means "not readable"
        raise batch_error(label, "unparseable", f"Parquet cannot be read: {arrow_message(exc)}")
    if metadata.num_rows > limits.max_rows:
        raise batch_error(label, "input_too_large", f"the file holds {metadata.num_rows} rows, "
                           f"limit {limits.max_rows}")
    uncompressed = sum(metadata.row_group(i).total_byte_size for i in range(metadata.num_row_groups))
    if uncompressed > limits.max_bytes:
        raise batch_error(label, "input_too_large", f"the file's data are {uncompressed} bytes "
                           f"uncompressed, limit {limits.max_bytes}")
    columns, _ = known_columns(names, label, limits)   # duplicates, missing columns
    try:
        # only the known columns: the others may be of any type or size
        table = parquet.read(columns=list(columns.values()), use_threads=False)
    except Exception as exc:  # noqa: BLE001 - any reader failure means "not readable"
        raise batch_error(label, "unparseable", f"Parquet cannot be read: {arrow_message(exc)}")
    return rows_from_arrow_table(table, "parquet", label, limits)


def arrow_message(exc: Exception) -> str:
    """The first line of a reader's error: later lines dump the reader's internal schema."""
    return short(str(exc).strip().split("\n", 1)[0], 200)


def read_parquet(data: bytes, label: str, limits: Limits, options: dict[str, Any]) -> Rows:
    return rows_from_parquet(data, label, limits)


register_reader(Reader("parquet", read_parquet, suffixes=(".parquet", ".pq"),
                       sniff=lambda data: data.startswith(b"PAR1")))
