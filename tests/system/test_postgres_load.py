"""The rankings and the store's tables loaded into a real PostgreSQL server.

A real ``sorbrank serve`` (embedded mode) fits two sample batches and one
truth-known synthetic batch whose ids carry the characters CSV and PostgreSQL
arrays treat specially. Then, in a real PostgreSQL (the session's ``postgres``
fixture: Debian's server programs, its own initdb on a free port):

- the table made by ``postgres_create_table`` from the export's Arrow schema
  takes ``GET /rankings?format=csv`` through ``COPY ... (FORMAT csv)``;
- the same rows from ``?format=parquet`` go in by binary ``COPY``;
- the store's summaries (the per-isotherm figures of each sorbent) and its
  sorbents table, read whole from their Parquet files, go in the same way.

Every table is then read back and compared with the Parquet rows value by
value: floats exactly (the CSV's numbers must parse back to the same double),
lists as PostgreSQL arrays, ids byte-identical. A CSV that only looks right
(list cells PostgreSQL cannot parse as arrays, rewritten ids, rounded floats)
fails here.
"""
from __future__ import annotations

import io
import math
from datetime import datetime
from pathlib import Path

import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest

from sorbrank.service.client import Client
from sorbrank.worker.store.sql import postgres_copy_from_stdin, postgres_create_table
from conftest import clean_env, isotherm, json_batch, start_server

ROOT = Path(__file__).resolve().parents[2]
SAMPLES = ROOT / "sample_batches"
SAMPLE_FILES = ("b01_fram_kpa_mmolg.csv", "b07_resend_mixed_quality.json")
# ids with a quote, a comma, braces, a semicolon and non-ASCII letters: CSV
# must quote them, and none of them may be altered on the way
TRICKY_IDS = ('MOF "q", a;b {c}', "Zéolithe 13X, lot 7")

pytestmark = pytest.mark.integration


def synthetic_batch() -> bytes:
    # Langmuir isotherms (invented, truth-known) at three temperatures, so the
    # sorbents table also gets its across-temperature rows
    isotherms = [isotherm(sorbent, q_sat, b * math.exp(2000.0 * (1 / t - 1 / 298.15)), t)
                 for sorbent, q_sat, b in ((TRICKY_IDS[0], 4.0, 0.05), (TRICKY_IDS[1], 2.5, 0.2))
                 for t in (273.15, 298.15, 323.15)]
    return json_batch(isotherms, label="postgres-load")


@pytest.fixture(scope="module")
def exports(tmp_path_factory):
    """(rankings as Parquet, rankings CSV bytes, response headers, store root)."""
    base = tmp_path_factory.mktemp("postgres-load")
    data_dir = base / "data"
    env = clean_env(SORBRANK_DATA_DIR=str(data_dir), PYTHONPATH=str(ROOT))
    procs: list = []
    try:
        _, url = start_server(env, base / "logs", procs)
        client = Client(url)
        batch = base / "tricky_ids.json"
        batch.write_bytes(synthetic_batch())
        for path in [SAMPLES / name for name in SAMPLE_FILES] + [batch]:
            reply = client.submit_file(path)
            status = client.wait(reply["batch_id"], timeout_s=600)
            assert status["state"] == "done", (path.name, status)
        import requests

        got = {}
        # no limit: machine formats hold every matching row
        for fmt in ("parquet", "csv"):
            resp = requests.get(url + "/api/v1/rankings", params={"format": fmt},
                                timeout=120)
            assert resp.status_code == 200, resp.text[:2000]
            got[fmt] = resp
        parquet = pq.read_table(io.BytesIO(got["parquet"].content))
        yield parquet, got["csv"].content, got["csv"].headers, data_dir
    finally:
        for proc in reversed(procs):
            proc.stop()


@pytest.fixture(scope="module")
def pg_db(postgres):
    return postgres.new_database("load")


def test_the_exports_hold_every_row_and_the_tricky_ids(exports):
    parquet, csv_bytes, headers, _ = exports
    assert parquet.num_rows == int(headers["X-Total-Count"]) > 100
    assert set(TRICKY_IDS) <= set(parquet["sorbent_id"].to_pylist())
    csv_lines = csv_bytes.decode().splitlines()
    # the tricky ids hold no line break, so one line per row plus the header
    assert len(csv_lines) == parquet.num_rows + 1


def test_rankings_csv_copy_reads_back_as_the_parquet_rows(exports, postgres, pg_db):
    parquet, csv_bytes, _, _ = exports
    with postgres.connect(pg_db, autocommit=True) as conn:
        conn.execute(postgres_create_table("rankings_csv", parquet.schema))
        copy_sql = postgres_copy_from_stdin("rankings_csv", parquet.schema, format="csv",
                                            match_header=True)
        with conn.cursor() as cur:
            try:
                with cur.copy(copy_sql) as copy:
                    copy.write(csv_bytes)
            except Exception as exc:  # noqa: BLE001 - re-raised as the test's failure
                pytest.fail(f"PostgreSQL refused the CSV export: {type(exc).__name__}: {exc}")
        assert_same_rows(conn, "rankings_csv", parquet, key=("isotherm_id",))


def test_rankings_parquet_rows_read_back_unchanged(exports, postgres, pg_db):
    parquet, _, _, _ = exports
    with postgres.connect(pg_db, autocommit=True) as conn:
        load_rows(conn, "rankings_parquet", parquet)
        assert_same_rows(conn, "rankings_parquet", parquet, key=("isotherm_id",))


@pytest.mark.parametrize("table,key", [("summaries", ("batch_id", "isotherm_id")),
                                       ("sorbents", ("batch_id", "sorbent_id", "adsorbate",
                                                     "kind"))])
def test_store_tables_load_whole(exports, postgres, pg_db, table, key):
    _, _, _, data_dir = exports
    data = read_store_table(data_dir, table)
    assert data.num_rows > 0, f"the store's {table} table is empty"
    with postgres.connect(pg_db, autocommit=True) as conn:
        load_rows(conn, f"store_{table}", data)
        assert_same_rows(conn, f"store_{table}", data, key=key)


def test_the_documented_definitions_take_the_store_tables(exports, postgres):
    # the CREATE TABLEs docs/schema.md shows, made from the declared schemas
    from sorbrank.worker.store.schema import schemas
    from sorbrank.worker.store.sql import create_table_statements

    _, _, _, data_dir = exports
    db = postgres.new_database("documented")
    with postgres.connect(db, autocommit=True) as conn:
        conn.execute(create_table_statements(schemas()))
        for table, key in (("summaries", ("batch_id", "isotherm_id")),
                           ("sorbents", ("batch_id", "sorbent_id", "adsorbate", "kind"))):
            data = read_store_table(data_dir, table)
            copy_rows(conn, table, data)
            assert_same_rows(conn, table, data, key=key)


# -- helpers ----------------------------------------------------------------------

def read_store_table(data_dir: Path, table: str) -> pa.Table:
    """Every Parquet file of one store table as one dataset (no per-file fixes:
    the files must share one schema), the batch id from the partition path
    when the files do not hold it themselves."""
    files = sorted(str(p) for p in (data_dir / table).glob("batch_id=*/*.parquet")
                   if not p.name.startswith("."))
    assert files, f"no {table} files under {data_dir}"
    in_file = "batch_id" in pq.read_schema(files[0]).names
    dataset = ds.dataset(files, format="parquet", partitioning=None if in_file else "hive",
                         partition_base_dir=str(data_dir / table))
    return dataset.to_table()


def load_rows(conn, name: str, data: pa.Table) -> None:
    """CREATE TABLE from the data's schema, then a binary COPY of its rows."""
    conn.execute(postgres_create_table(name, data.schema))
    copy_rows(conn, name, data)


def copy_rows(conn, name: str, data: pa.Table) -> None:
    """A binary COPY of ``data``'s rows into its columns (by name) of table ``name``."""
    types = dict(conn.execute(
        "SELECT attname, format_type(atttypid, atttypmod) FROM pg_attribute "
        "WHERE attrelid = %s::regclass AND attnum > 0 AND NOT attisdropped",
        (f'"{name}"',)).fetchall())
    missing = [c for c in data.column_names if c not in types]
    assert not missing, f"table {name} has no column(s) {missing}"
    with conn.cursor() as cur:
        with cur.copy(postgres_copy_from_stdin(name, data.schema, format="binary")) as copy:
            # numeric(p,s) -> numeric
            copy.set_types([types[c].split("(")[0] for c in data.column_names])
            for batch in data.to_batches(max_chunksize=2_000):
                for row in zip(*(column.to_pylist() for column in batch.columns)):
                    copy.write_row(row)


def assert_same_rows(conn, name: str, want: pa.Table, key: tuple[str, ...]) -> None:
    """The PostgreSQL table holds exactly ``want``'s rows, value by value."""
    columns = want.column_names
    select = ", ".join('"' + c.replace('"', '""') + '"' for c in columns)
    got_rows = conn.execute(f'SELECT {select} FROM "{name}"').fetchall()
    want_rows = [tuple(r) for r in zip(*(want[c].to_pylist() for c in columns))]
    at = [columns.index(k) for k in key]
    want_by_key = {tuple(r[i] for i in at): r for r in want_rows}
    assert len(want_by_key) == len(want_rows), f"{key} is not a key of the Parquet rows"
    got_by_key = {tuple(r[i] for i in at): r for r in got_rows}
    assert len(got_rows) == len(want_rows), (len(got_rows), len(want_rows))
    missing = sorted(set(want_by_key) - set(got_by_key), key=repr)
    assert not missing, f"{len(missing)} rows missing or with altered ids, e.g. {missing[:3]}"
    differences = []
    for k, want_row in want_by_key.items():
        for column, got, wanted in zip(columns, got_by_key[k], want_row):
            if not same_value(got, wanted):
                differences.append(f"{k} {column}: PostgreSQL {got!r}, Parquet {wanted!r}")
    assert not differences, (f"{len(differences)} cells differ, e.g.:\n"
                             + "\n".join(differences[:15]))


def same_value(got, want) -> bool:
    if want is None or got is None:
        return got is None and want is None
    if isinstance(want, float):
        # exact: the same double (NaN is NaN), not merely close
        return isinstance(got, float) and (got == want or (math.isnan(got) and math.isnan(want)))
    if isinstance(want, list):
        return isinstance(got, list) and len(got) == len(want) and all(
            same_value(g, w) for g, w in zip(got, want))
    if isinstance(want, datetime):
        # an aware instant is the same whatever zone it is shown in
        return isinstance(got, datetime) and got == want and (got.tzinfo is None) == (
            want.tzinfo is None)
    return type(got) is type(want) and got == want
