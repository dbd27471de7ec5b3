"""PostgreSQL table definitions from Arrow schemas (worker/store/sql.py).

The text checks pin the mapping; the checks against a real PostgreSQL server
(the session's ``postgres`` fixture) prove that the server accepts every
definition, reports the types we meant (``format_type`` from its catalog),
keeps the comments, and that each mapped type holds the extreme values of its
Arrow type exactly (binary COPY in, SELECT out).
"""
from __future__ import annotations

import math
import struct
from datetime import date, datetime, time, timedelta, timezone
from decimal import Decimal

import pyarrow as pa
import pytest

from sorbrank.worker.store.sql import (UnmappableType, column_comment, create_table_statements,
                                       postgres_copy_from_stdin, postgres_create_table,
                                       postgres_type, quote_identifier, quote_literal)

# Arrow type -> the name PostgreSQL's format_type() gives the column
EXPECTED = [
    (pa.bool_(), "boolean"),
    (pa.int8(), "smallint"),
    (pa.int16(), "smallint"),
    (pa.int32(), "integer"),
    (pa.int64(), "bigint"),
    (pa.uint8(), "smallint"),
    (pa.uint16(), "integer"),
    (pa.uint32(), "bigint"),
    (pa.uint64(), "numeric(20,0)"),
    (pa.float32(), "real"),
    (pa.float64(), "double precision"),
    (pa.string(), "text"),
    (pa.large_string(), "text"),
    (pa.dictionary(pa.int32(), pa.string()), "text"),
    (pa.binary(), "bytea"),
    (pa.binary(4), "bytea"),
    (pa.decimal128(12, 4), "numeric(12,4)"),
    (pa.date32(), "date"),
    (pa.timestamp("us", tz="UTC"), "timestamp with time zone"),
    (pa.timestamp("ms"), "timestamp without time zone"),
    (pa.time64("us"), "time without time zone"),
    (pa.duration("us"), "interval"),
    (pa.list_(pa.float64()), "double precision[]"),
    (pa.large_list(pa.string()), "text[]"),
    (pa.list_(pa.int64(), 3), "bigint[]"),
    (pa.list_(pa.bool_()), "boolean[]"),
]


@pytest.mark.parametrize("arrow_type,pg_type", EXPECTED, ids=[str(t) for t, _ in EXPECTED])
def test_each_arrow_type_has_its_postgres_type(arrow_type, pg_type):
    assert postgres_type(arrow_type) == pg_type


@pytest.mark.parametrize("arrow_type,fragment", [
    (pa.null(), "every value is null"),
    (pa.list_(pa.null()), "elements have type null"),
    (pa.timestamp("ns", tz="UTC"), "microseconds"),
    (pa.time64("ns"), "microseconds"),
    (pa.duration("ns"), "microseconds"),
    (pa.list_(pa.list_(pa.float64())), "list of lists"),
    (pa.struct([("a", pa.int64())]), "only scalars"),
    (pa.map_(pa.string(), pa.int64()), "only scalars"),
])
def test_types_without_an_exact_home_are_refused_by_column(arrow_type, fragment):
    schema = pa.schema([("sorbent_id", pa.string()), ("odd_column", arrow_type)])
    with pytest.raises(UnmappableType) as caught:
        postgres_create_table("summaries", schema)
    message = str(caught.value)
    assert "'summaries'" in message and "'odd_column'" in message and fragment in message
    assert caught.value.column == "odd_column"


def test_identifiers_are_quoted_and_keep_case_and_quotes():
    assert quote_identifier("flags") == '"flags"'
    assert quote_identifier('Odd "Name"') == '"Odd ""Name"""'
    with pytest.raises(ValueError, match="63 bytes"):
        quote_identifier("x" * 64)
    with pytest.raises(ValueError, match="NUL"):
        quote_identifier("a\x00b")
    quote_identifier("é" * 31)  # 62 bytes: kept
    with pytest.raises(ValueError, match="bytes"):
        quote_identifier("é" * 32)  # 64 bytes: PostgreSQL would truncate it


def test_literals_survive_quotes_and_backslashes():
    assert quote_literal("it's") == "'it''s'"
    assert quote_literal(r"a\b") == r"E'a\\b'"


def test_comments_come_from_description_and_unit_metadata():
    plain = pa.field("x", pa.float64())
    assert column_comment(plain) is None
    both = plain.with_metadata({b"description": b"saturation capacity", b"unit": b"mol/kg"})
    assert column_comment(both) == "saturation capacity [unit: mol/kg]"
    assert column_comment(plain.with_metadata({b"unit": b"Pa"})) == "[unit: Pa]"


def test_definition_text():
    schema = pa.schema([pa.field("isotherm_id", pa.string(), nullable=False),
                        pa.field("q_sat_mol_per_kg", pa.float64(),
                                 metadata={b"description": b"the selected model's capacity",
                                           b"unit": b"mol/kg"}),
                        pa.field("flags", pa.list_(pa.string()))],
                       metadata={b"description": b"one row per isotherm"})
    ddl = postgres_create_table("rankings", schema, namespace="screening")
    assert ddl == (
        'CREATE TABLE "screening"."rankings" (\n'
        '    "isotherm_id" text NOT NULL,\n'
        '    "q_sat_mol_per_kg" double precision,\n'
        '    "flags" text[]\n'
        ');\n'
        'COMMENT ON TABLE "screening"."rankings" IS \'one row per isotherm\';\n'
        'COMMENT ON COLUMN "screening"."rankings"."q_sat_mol_per_kg" IS '
        '\'the selected model\'\'s capacity [unit: mol/kg]\';\n')
    assert postgres_copy_from_stdin("rankings", schema) == (
        'COPY "rankings" ("isotherm_id", "q_sat_mol_per_kg", "flags") FROM STDIN '
        '(FORMAT csv, HEADER true)')
    assert postgres_copy_from_stdin("rankings", schema, namespace="screening", match_header=True
                                    ).endswith('"screening"."rankings" ("isotherm_id", '
                                               '"q_sat_mol_per_kg", "flags") FROM STDIN '
                                               '(FORMAT csv, HEADER match)')
    with pytest.raises(ValueError, match="csv format only"):
        postgres_copy_from_stdin("rankings", schema, format="binary", match_header=True)


def test_store_tables_get_their_partition_column_last():
    schemas = {"summaries": pa.schema([("isotherm_id", pa.string())]),
               "other": pa.schema([("x", pa.int64()), ("batch_id", pa.string())])}
    script = create_table_statements(schemas)
    assert script.startswith('CREATE TABLE "summaries" (\n    "isotherm_id" text,\n'
                             '    "batch_id" text NOT NULL\n);\n'
                             'COMMENT ON COLUMN "summaries"."batch_id" IS ')
    # a schema that holds the column keeps it where it is, once
    assert ('CREATE TABLE "other" (\n    "x" bigint,\n    "batch_id" text\n);\n'
            in script)
    assert "batch_id" not in create_table_statements(
        {"summaries": schemas["summaries"]}, partition_column=None)


def test_repeated_and_unknown_key_columns_are_refused():
    with pytest.raises(ValueError, match="appears twice"):
        postgres_create_table("t", pa.schema([("a", pa.int64()), ("a", pa.string())]))
    with pytest.raises(ValueError, match="primary key"):
        postgres_create_table("t", pa.schema([("a", pa.int64())]), primary_key=["b"])
    with pytest.raises(ValueError, match="no columns"):
        postgres_create_table("t", pa.schema([]))


# -- against a real server ------------------------------------------------------

# extreme values of each Arrow type; each must come back from PostgreSQL equal
UTC = timezone.utc
EXTREMES = {
    "bool_col": (pa.bool_(), [True, False, None]),
    "int8_col": (pa.int8(), [-128, 127, None]),
    "int16_col": (pa.int16(), [-32768, 32767, 0]),
    "int32_col": (pa.int32(), [-2**31, 2**31 - 1, 0]),
    "int64_col": (pa.int64(), [-2**63, 2**63 - 1, 0]),
    "uint8_col": (pa.uint8(), [0, 255, None]),
    "uint16_col": (pa.uint16(), [0, 65535, 1]),
    "uint32_col": (pa.uint32(), [0, 2**32 - 1, 1]),
    "uint64_col": (pa.uint64(), [0, 2**64 - 1, 1]),
    # float32 values that are exact in binary32; 2**-149 is its smallest subnormal
    "float32_col": (pa.float32(), [3.4028234663852886e38, 2.0**-149, -0.5]),
    # the largest double, the smallest subnormal, a value that needs 17 digits
    "float64_col": (pa.float64(), [1.7976931348623157e308, 5e-324, 0.1 + 0.2]),
    "text_col": (pa.string(), ['quote " comma , brace {a,b} back\\slash', "", "β ünï"]),
    "bytes_col": (pa.binary(), [b"\x00\xff", b"", None]),
    "decimal_col": (pa.decimal128(12, 4), [Decimal("-99999999.9999"), Decimal("0.0001"), None]),
    "date_col": (pa.date32(), [date(1, 1, 1), date(9999, 12, 31), None]),
    "ts_col": (pa.timestamp("us", tz="UTC"),
               [datetime(2026, 12, 4, 18, 0, 43, 196840, tzinfo=UTC),
                datetime(1970, 1, 1, tzinfo=UTC), None]),
    "wall_col": (pa.timestamp("us"), [datetime(2000, 2, 29, 23, 59, 59, 999999), None, None]),
    "time_col": (pa.time64("us"), [time(23, 59, 59, 999999), time(0), None]),
    "duration_col": (pa.duration("us"), [timedelta(days=3, microseconds=7), timedelta(0), None]),
    "floats_col": (pa.list_(pa.float64()), [[0.1, None, -1e-300], [], None]),
    "texts_col": (pa.list_(pa.string()), [["a,b", '"q"', "{x}", None], [], None]),
}


@pytest.fixture(scope="module")
def pg_db(postgres):
    return postgres.new_database("sql")


def _extremes_table() -> pa.Table:
    return pa.table({name: pa.array(values, type=t) for name, (t, values) in EXTREMES.items()})


@pytest.mark.integration
def test_postgres_accepts_the_definition_with_our_types_and_comments(postgres, pg_db):
    schema = pa.schema([pa.field(f"c{i}", t, metadata={b"unit": b"Pa"} if i == 3 else None)
                        for i, (t, _) in enumerate(EXPECTED)]
                       + [pa.field("Odd \"Name\"", pa.string(), nullable=False,
                                   metadata={b"description": "it's β \\ ok".encode()})],
                       metadata={b"description": b"every mapped type"})
    with postgres.connect(pg_db, autocommit=True) as conn:
        conn.execute(postgres_create_table("every_type", schema))
        rows = conn.execute(
            "SELECT a.attname, format_type(a.atttypid, a.atttypmod), a.attnotnull, "
            "col_description(a.attrelid, a.attnum) FROM pg_attribute a "
            "WHERE a.attrelid = '\"every_type\"'::regclass AND a.attnum > 0 ORDER BY a.attnum"
        ).fetchall()
        table_comment = conn.execute(
            "SELECT obj_description('\"every_type\"'::regclass, 'pg_class')").fetchone()[0]
    assert [r[0] for r in rows] == schema.names
    assert [r[1] for r in rows[:-1]] == [pg for _, pg in EXPECTED]
    assert rows[-1][1:] == ("text", True, "it's β \\ ok")
    assert rows[3][3] == "[unit: Pa]"
    assert [r[3] for r in rows[:3]] == [None, None, None]
    assert table_comment == "every mapped type"


@pytest.mark.integration
def test_each_mapped_type_holds_its_extreme_values_exactly(postgres, pg_db):
    table = _extremes_table()
    with postgres.connect(pg_db, autocommit=True) as conn:
        conn.execute(postgres_create_table("extremes", table.schema))
        types = [r[0] for r in conn.execute(
            "SELECT format_type(atttypid, atttypmod) FROM pg_attribute WHERE attrelid = "
            "'\"extremes\"'::regclass AND attnum > 0 ORDER BY attnum")]
        with conn.cursor() as cur:
            with cur.copy(postgres_copy_from_stdin("extremes", table.schema,
                                                   format="binary")) as copy:
                copy.set_types([t.split("(")[0] for t in types])
                for row in table.to_pylist():
                    copy.write_row([_adapt(v) for v in row.values()])
        back = conn.execute("SELECT * FROM extremes").fetchall()
    expected = [tuple(row.values()) for row in table.to_pylist()]
    assert len(back) == len(expected)
    for got_row, want_row in zip(back, expected):
        for name, got, want in zip(table.column_names, got_row, want_row):
            if name == "float32_col":  # real comes back as its shortest binary32 text
                got = struct.unpack("<f", struct.pack("<f", got))[0]
            assert _same(got, want), (name, got, want)


def _adapt(value):
    # unsigned 64-bit values go to numeric, which psycopg writes from Decimal
    return Decimal(value) if isinstance(value, int) and value > 2**63 - 1 else value


def _same(got, want) -> bool:
    if isinstance(want, float):
        return isinstance(got, float) and (got == want and math.copysign(1, got)
                                           == math.copysign(1, want))
    if isinstance(want, list):
        return isinstance(got, list) and len(got) == len(want) and all(
            _same(g, w) for g, w in zip(got, want))
    if isinstance(want, bytes):
        return bytes(got) == want
    if isinstance(want, int) and not isinstance(want, bool) and isinstance(got, Decimal):
        return got == Decimal(want)
    return type(got) is type(want) and got == want
