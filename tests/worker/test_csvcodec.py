"""The CSV cell encoding (sorbrank.worker.csvcodec) against the outside world.

References: a real PostgreSQL server (the session fixture) reads the files by
``COPY ... (FORMAT csv)`` into typed and array columns, and writes array literals
our decoder must read (PostgreSQL documentation, 8.15.6 "Array Input and Output
Syntax" and 8.1.3 "Floating-Point Types"); Python's ``csv`` module reads the
files as RFC 4180 CSV; Python's ``float`` reads the floats back (repr is the
shortest text that round-trips, Python documentation). Values are invented.
"""
from __future__ import annotations

import csv
import io
import math
import random
from datetime import datetime, timezone

import pyarrow as pa
import pytest

from sorbrank.worker import csvcodec

TRICKY_TEXT = ["plain", "", "NULL", "null", "a,b", "{x}", 'q"t', "back\\slash", " lead",
               "trail ", "in side", "tab\there", "line\nbreak", "crlf\r\n", "é ü ß 中",
               "'apostrophe", "=1+2", "+SUM(A1)", "-MOF-neg", "@cmd", "\tTAB", "\rCR",
               "'=already", "''-two", "-1.5", "-1.5e3", "+3", "Infinity", "NaN", "{}", "\\"]
TRICKY_FLOATS = [0.0, -0.0, 0.1, 0.0031, 1 / 3, 2.0 ** -1074, 1.7976931348623157e308, -2.5e-300,
                 123456789.123456789, 1e16, 1e22, math.pi, float("inf"), float("-inf")]


def _table() -> pa.Table:
    n = len(TRICKY_TEXT)
    floats = [TRICKY_FLOATS[i % len(TRICKY_FLOATS)] for i in range(n)]
    floats[3], floats[5] = None, float("nan")
    lists = [[TRICKY_TEXT[i], TRICKY_TEXT[(i + 7) % n], None] for i in range(n)]
    lists[0], lists[1], lists[2] = [], None, [""]
    float_lists = [[TRICKY_FLOATS[(i + k) % len(TRICKY_FLOATS)] for k in range(3)] + [None]
                   for i in range(n)]
    moment = datetime(2026, 12, 4, 18, 0, 7, 123456, tzinfo=timezone.utc)
    return pa.table({
        "txt": pa.array([t if t != "" else "x" for t in TRICKY_TEXT], pa.string()),
        "num": pa.array(floats, pa.float64()),
        "cnt": pa.array([i - 3 if i % 4 else None for i in range(n)], pa.int64()),
        "ok": pa.array([None if i % 5 == 0 else i % 2 == 0 for i in range(n)], pa.bool_()),
        "at": pa.array([moment if i % 3 else None for i in range(n)], pa.timestamp("us", "UTC")),
        "tags": pa.array(lists, pa.list_(pa.string())),
        "xs": pa.array(float_lists, pa.list_(pa.float64())),
    })


def _same(a, b) -> bool:
    """Equal, NaN counted as null (CSV has one "no value"), -0.0 apart from 0.0."""
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    if isinstance(a, float) and math.isnan(a):
        a = None
    if isinstance(b, float) and math.isnan(b):
        b = None
    if isinstance(a, float) and isinstance(b, float):
        return a == b and math.copysign(1, a) == math.copysign(1, b)
    return a == b and type(a) is type(b)


def test_every_cell_reads_back_through_the_csv_module():
    table = _table()
    text = csvcodec.csv_bytes(table).decode()
    rows = list(csv.reader(io.StringIO(text)))
    assert rows[0] == table.column_names and len(rows) == table.num_rows + 1
    types = [f.type for f in table.schema]
    for got_row, want in zip(rows[1:], table.to_pylist()):
        got = [csvcodec.decode_cell(cell, t) for cell, t in zip(got_row, types)]
        for name, value in zip(table.column_names, got):
            assert _same(value, want[name]), (name, value, want[name])


def test_floats_are_shortest_round_trip_text():
    for value in TRICKY_FLOATS:
        text = csvcodec.cell_text(value)
        assert float(text) == value and math.copysign(1, float(text)) == math.copysign(1, value)
        if math.isfinite(value):
            assert text == repr(value)
    assert csvcodec.cell_text(0.1 + 0.2) == "0.30000000000000004"  # a real difference stays
    assert csvcodec.cell_text(float("nan")) is None and csvcodec.cell_text(None) is None
    assert csvcodec.cell_text(float("inf")) == "Infinity"


def test_the_formula_guard_is_reversible_and_leaves_no_formula():
    rng = random.Random(19)
    alphabet = ["'", "=", "+", "-", "@", "\t", "\r", "1", ".", "e", "a", " "]
    samples = TRICKY_TEXT + ["".join(rng.choice(alphabet) for _ in range(rng.randint(1, 6)))
                             for _ in range(5000)]
    for text in samples:
        cell = csvcodec.guard_text(text)
        assert csvcodec.unguard_text(cell) == text, repr(text)
        if cell[:1] in csvcodec.FORMULA_START:
            float(cell)  # only a plain number may start so (a negative value)
        # intake refuses exactly the ids the guard would change
        assert (cell != text) <= (csvcodec.formula_problem(text) is not None)


def test_lists_are_postgresql_array_literals():
    assert csvcodec.cell_text(["a", "b"]) == "{a,b}"
    assert csvcodec.cell_text([]) == "{}"
    assert csvcodec.cell_text(["", None, "NULL", 'a"b', "x y"]) == '{"",NULL,"NULL","a\\"b","x y"}'
    assert csvcodec.cell_text([1.5, None, float("nan"), float("-inf")]) == "{1.5,NULL,NULL,-Infinity}"
    assert csvcodec.cell_text([[1, 2], [3]]) == "{{1,2},{3}}"
    assert csvcodec.parse_array('{a, "b c" ,NULL,"NULL", {x}}') == ["a", "b c", None, "NULL", ["x"]]
    for bad in ("a,b", "{a", '{"a}', "{a}x", "{a{b}"):
        with pytest.raises(ValueError):
            csvcodec.parse_array(bad)


def test_postgresql_copy_reads_every_cell_as_written(postgres):
    """The CSV goes into a real PostgreSQL by COPY (FORMAT csv, HEADER) into typed and
    array columns; every value read back equals the one written (NaN: NULL)."""
    table = _table()
    db = postgres.new_database("csvcodec")
    with postgres.connect(db) as conn:
        conn.execute("CREATE TABLE t (txt text, num float8, cnt bigint, ok boolean, "
                     "at timestamptz, tags text[], xs float8[])")
        with conn.cursor().copy("COPY t FROM STDIN (FORMAT csv, HEADER true)") as copy:
            copy.write(csvcodec.csv_bytes(table))
        got = conn.execute("SELECT * FROM t").fetchall()
        # guarded text arrives with its apostrophe: what a spreadsheet user sees
        assert [row[0] for row in got] == [csvcodec.guard_text(r["txt"]) for r in table.to_pylist()]
    assert len(got) == table.num_rows
    for row, want in zip(got, table.to_pylist()):
        for name, value in zip(table.column_names[1:], row[1:]):
            assert _same(value, want[name]), (name, value, want[name])
    # the empty text and null stay apart (a quoted "" against an empty cell)
    with postgres.connect(db) as conn:
        conn.execute("CREATE TABLE e (txt text, n bigint)")
        with conn.cursor().copy("COPY e FROM STDIN (FORMAT csv, HEADER true)") as copy:
            copy.write(csvcodec.csv_bytes(pa.table({"txt": ["", None], "n": [1, 2]})))
        assert conn.execute("SELECT txt FROM e ORDER BY n").fetchall() == [("",), (None,)]


def test_the_decoder_reads_postgresql_array_output(postgres):
    """PostgreSQL's own array_out text (its quoting rules, not ours) parses back to the
    elements it was given."""
    elements = TRICKY_TEXT + [None]
    with postgres.connect() as conn:
        (text,) = conn.execute("SELECT %s::text[]::text", [elements]).fetchone()
        assert csvcodec.parse_array(text) == elements
        (text,) = conn.execute("SELECT ARRAY[1.5, 'Infinity', NULL, 2e-300]::float8[]::text"
                               ).fetchone()
        assert [None if e is None else float(e) for e in csvcodec.parse_array(text)] == \
            [1.5, float("inf"), None, 2e-300]
