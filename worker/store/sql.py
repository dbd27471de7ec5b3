"""PostgreSQL table definitions from the store's Arrow schemas.

A data team loads the rankings or a store table into PostgreSQL with the
``CREATE TABLE`` this module writes, then ``COPY`` from our CSV export or rows
read from our Parquet. The definition is derived from the declared Arrow
schema, never written by hand, so the two cannot drift apart.

Every Arrow type maps to the PostgreSQL type that holds each of its values
exactly (int64 -> bigint, float64 -> double precision, timestamp[us, UTC] ->
timestamptz, list<x> -> x[] ...). A type with no exact home is refused with
an error naming the column rather than mapped to something that would
round, truncate or reorder values (nanosecond timestamps, nested or struct
values, the type of an all-null column).
"""
from __future__ import annotations

from typing import Iterable, Mapping

import pyarrow as pa

# PostgreSQL keeps NAMEDATALEN - 1 = 63 bytes of an identifier and silently
# truncates longer ones, so two long column names could become the same column
MAX_IDENTIFIER_BYTES = 63

# The store keeps each row's batch in its partition directory
# (``<table>/batch_id=<id>/``), not in the files
PARTITION_COLUMN = "batch_id"

# Field metadata keys turned into column comments (and the schema's own
# b"description" into the table comment).
DESCRIPTION_KEY = b"description"
UNIT_KEY = b"unit"

# Arrow types with one exact PostgreSQL home. PostgreSQL has no unsigned or
# 1-byte integers, so each unsigned type goes to the next wider signed one.
_SCALAR_TYPES: tuple[tuple[pa.DataType, str], ...] = (
    (pa.bool_(), "boolean"),
    (pa.int8(), "smallint"),
    (pa.int16(), "smallint"),
    (pa.int32(), "integer"),
    (pa.int64(), "bigint"),
    (pa.uint8(), "smallint"),
    (pa.uint16(), "integer"),
    (pa.uint32(), "bigint"),
    (pa.uint64(), "numeric(20,0)"),  # 2**64 - 1 has 20 digits
    (pa.float16(), "real"),
    (pa.float32(), "real"),
    (pa.float64(), "double precision"),
    (pa.string(), "text"),
    (pa.large_string(), "text"),
    (pa.binary(), "bytea"),
    (pa.large_binary(), "bytea"),
    (pa.date32(), "date"),
    (pa.date64(), "date"),
) + tuple((getattr(pa, view)(), pg_name)  # the view types are newer than pyarrow 15
          for view, pg_name in (("string_view", "text"), ("binary_view", "bytea"))
          if hasattr(pa, view))
# PostgreSQL's time types keep microseconds
_TIME_UNITS = ("s", "ms", "us")
# numeric's declared precision limit (PostgreSQL docs, "Arbitrary Precision Numbers")
_NUMERIC_MAX_PRECISION = 1000


class UnmappableType(TypeError):
    """An Arrow column whose values PostgreSQL cannot hold exactly."""

    def __init__(self, table: str, column: str, arrow_type: pa.DataType, why: str):
        self.table, self.column, self.arrow_type = table, column, arrow_type
        super().__init__(f"table {table!r}, column {column!r}: Arrow type {arrow_type} has no "
                         f"exact PostgreSQL type ({why})")


def quote_identifier(name: str) -> str:
    """``name`` as a PostgreSQL quoted identifier: case and every character kept."""
    if not isinstance(name, str) or not name:
        raise ValueError(f"an identifier must be non-empty text, not {name!r}")
    if "\x00" in name:
        raise ValueError(f"identifier {name!r} contains a NUL character")
    if len(name.encode()) > MAX_IDENTIFIER_BYTES:
        raise ValueError(f"identifier {name!r} is {len(name.encode())} bytes; PostgreSQL "
                         f"truncates identifiers to {MAX_IDENTIFIER_BYTES} bytes")
    return '"' + name.replace('"', '""') + '"'


def quote_literal(text: str) -> str:
    """``text`` as a string constant that reads the same whatever
    ``standard_conforming_strings`` is set to (an E'' constant when it holds
    a backslash)."""
    if "\x00" in text:
        raise ValueError("PostgreSQL text cannot hold a NUL character")
    quoted = text.replace("'", "''")
    if "\\" in text:
        return "E'" + quoted.replace("\\", "\\\\") + "'"
    return "'" + quoted + "'"


def qualified_name(name: str, namespace: str | None = None) -> str:
    return (quote_identifier(namespace) + "." if namespace else "") + quote_identifier(name)


def _is_list(t: pa.DataType) -> bool:
    kinds = ("is_list", "is_large_list", "is_fixed_size_list", "is_list_view",
             "is_large_list_view")
    return any(getattr(pa.types, kind, lambda _: False)(t) for kind in kinds)


def postgres_type(arrow_type: pa.DataType, *, table: str = "?", column: str = "?") -> str:
    """The PostgreSQL type of one Arrow column (``table``/``column`` name it in errors)."""
    def refuse(why: str) -> UnmappableType:
        return UnmappableType(table, column, arrow_type, why)

    for known, pg_name in _SCALAR_TYPES:
        if arrow_type.equals(known):
            return pg_name
    t = arrow_type
    if pa.types.is_null(t):
        raise refuse("every value is null, so the data carry no type; declare the column's "
                     "type in the schema")
    if pa.types.is_dictionary(t):
        return postgres_type(t.value_type, table=table, column=column)
    if pa.types.is_fixed_size_binary(t):
        return "bytea"
    if pa.types.is_decimal(t):
        if t.precision > _NUMERIC_MAX_PRECISION:
            raise refuse(f"numeric precision is at most {_NUMERIC_MAX_PRECISION}")
        return f"numeric({t.precision},{t.scale})"
    if pa.types.is_timestamp(t):
        if t.unit not in _TIME_UNITS:
            raise refuse("PostgreSQL keeps microseconds; cast to timestamp[us] first")
        # a zone-less Arrow timestamp is wall-clock time, a zoned one an instant
        return "timestamp with time zone" if t.tz is not None else "timestamp without time zone"
    if pa.types.is_time(t):
        if t.unit not in _TIME_UNITS:
            raise refuse("PostgreSQL keeps microseconds; cast to time64[us] first")
        return "time without time zone"
    if pa.types.is_duration(t):
        if t.unit not in _TIME_UNITS:
            raise refuse("PostgreSQL keeps microseconds; cast to duration[us] first")
        return "interval"
    if _is_list(t):
        element = t.value_type
        if _is_list(element):
            # PostgreSQL arrays of arrays must be rectangular; Arrow's need not be
            raise refuse("a list of lists has no PostgreSQL array form for ragged values")
        if pa.types.is_null(element):
            raise refuse("its elements have type null, so the data carry no type; declare "
                         "the element type in the schema")
        return postgres_type(element, table=table, column=column) + "[]"
    raise refuse("only scalars, decimals, times and lists of scalars are mapped")


def column_comment(field: pa.Field) -> str | None:
    """The field's description and unit as one comment, or None when it has neither."""
    meta = field.metadata or {}
    description = meta.get(DESCRIPTION_KEY, b"").decode().strip()
    unit = meta.get(UNIT_KEY, b"").decode().strip()
    if unit:
        description = f"{description} [unit: {unit}]" if description else f"[unit: {unit}]"
    return description or None


def _column_names(schema: pa.Schema, table: str) -> list[str]:
    names = schema.names
    seen: set[str] = set()
    for name in names:
        if name in seen:
            raise ValueError(f"table {table!r}: column {name!r} appears twice")
        seen.add(name)
    return names


def postgres_columns(name: str, schema: pa.Schema) -> list[tuple[str, str]]:
    """(column name, PostgreSQL type) for every field of ``schema``, in order."""
    _column_names(schema, name)
    return [(f.name, postgres_type(f.type, table=name, column=f.name)) for f in schema]


def postgres_create_table(name: str, schema: pa.Schema, *, namespace: str | None = None,
                          primary_key: Iterable[str] = ()) -> str:
    """``CREATE TABLE`` for ``schema``, then ``COMMENT ON`` the table (the
    schema's b"description" metadata) and each column that has b"description"
    or b"unit" metadata. Statements end with ";" and a newline, so the text
    runs as one script (psql -f, or one psycopg ``execute`` without parameters).

    Non-nullable fields become NOT NULL. Raises ``UnmappableType`` naming the
    first column PostgreSQL cannot hold exactly, ``ValueError`` for a name
    PostgreSQL would change (longer than 63 bytes) or a repeated column.
    """
    table = qualified_name(name, namespace)
    columns = postgres_columns(name, schema)
    if not columns:
        raise ValueError(f"table {name!r} has no columns")
    key = list(primary_key)
    unknown = [k for k in key if k not in schema.names]
    if unknown:
        raise ValueError(f"table {name!r}: primary key column(s) {unknown} are not in the schema")
    lines = []
    for field, (column, pg_type) in zip(schema, columns):
        not_null = " NOT NULL" if not field.nullable or column in key else ""
        lines.append(f"    {quote_identifier(column)} {pg_type}{not_null}")
    if key:
        lines.append("    PRIMARY KEY (" + ", ".join(map(quote_identifier, key)) + ")")
    statements = [f"CREATE TABLE {table} (\n" + ",\n".join(lines) + "\n)"]
    table_description = (schema.metadata or {}).get(DESCRIPTION_KEY, b"").decode().strip()
    if table_description:
        statements.append(f"COMMENT ON TABLE {table} IS {quote_literal(table_description)}")
    for field in schema:
        comment = column_comment(field)
        if comment:
            statements.append(f"COMMENT ON COLUMN {table}.{quote_identifier(field.name)} "
                              f"IS {quote_literal(comment)}")
    return "".join(s + ";\n" for s in statements)


def create_table_statements(schemas: Mapping[str, pa.Schema], *, namespace: str | None = None,
                            partition_column: str | None = PARTITION_COLUMN) -> str:
    """The definitions of several store tables, one script (docs/schema.md shows it).

    A schema without ``partition_column`` gets it as a last ``text NOT NULL``
    column: the store keeps the batch id in the directory name, a row loaded
    elsewhere needs it, and hive-partitioned readers (pyarrow.dataset, DuckDB,
    polars) put it last, so their rows line up with the table's columns.
    """
    scripts = []
    for name, schema in schemas.items():
        if partition_column and partition_column not in schema.names:
            schema = schema.append(pa.field(partition_column, pa.string(), nullable=False,
                                            metadata={DESCRIPTION_KEY: b"the batch (the store's "
                                                      b"partition directory)"}))
        scripts.append(postgres_create_table(name, schema, namespace=namespace))
    return "\n".join(scripts)


def postgres_copy_from_stdin(name: str, schema: pa.Schema, *, namespace: str | None = None,
                             format: str = "csv", match_header: bool = False) -> str:
    """The ``COPY ... FROM STDIN`` that loads ``schema``'s columns by name:
    ``csv`` for our CSV export (its header line skipped; with ``match_header``
    checked against the column names, PostgreSQL 15 and later), or
    ``binary``/``text`` for rows sent by a client library."""
    options = {"csv": "FORMAT csv, HEADER " + ("match" if match_header else "true"),
               "binary": "FORMAT binary", "text": "FORMAT text"}
    if format not in options:
        raise ValueError(f"COPY format {format!r}: one of {', '.join(options)}")
    if match_header and format != "csv":
        raise ValueError("match_header applies to the csv format only")
    columns = ", ".join(quote_identifier(n) for n in _column_names(schema, name))
    return f"COPY {qualified_name(name, namespace)} ({columns}) FROM STDIN ({options[format]})"
