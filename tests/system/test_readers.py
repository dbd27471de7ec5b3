"""Every common reader opens the store whole: a store written by a real
``sorbrank serve`` (embedded mode) from several batches -- one with empty
text columns throughout, batches with different reference pressures, one
with a desorption branch, mixtures and a temperature swing -- is read table by
table with pandas.read_parquet, polars.scan_parquet, pyarrow.dataset and
DuckDB's read_parquet, each on a plain glob with hive partitioning and no
union-by-name or diagonal concatenation, and all four give the same rows
(multisets of rows compared value by value) with the same columns.

The batches are invented Langmuir data (truth-known synthetic)."""
from __future__ import annotations

import datetime as dt
import json
import math
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pytest

from conftest import clean_env, start_server

from sorbrank.service.client import Client
from sorbrank.worker.store import TABLES
from sorbrank.worker.store.schema import PARTITION_COLUMN, declared

ROOT = Path(__file__).resolve().parents[2]

pytestmark = pytest.mark.integration

PRESSURES_KPA = [1, 2, 5, 10, 20, 40, 60, 80, 100]


def langmuir(q_sat: float, b_per_kpa: float, pressures=PRESSURES_KPA) -> list[float]:
    return [round(q_sat * b_per_kpa * p / (1 + b_per_kpa * p), 6) for p in pressures]


def isotherm(sorbent: str, gas: str, temperature_k: float, q_sat: float, b: float,
             **extra) -> dict:
    return {"sorbent_id": sorbent, "adsorbate": gas, "temperature_k": temperature_k,
            "pressure": PRESSURES_KPA, "loading": langmuir(q_sat, b), **extra}


def batches() -> list[dict]:
    heat = lambda b, t: b * math.exp(2500.0 * (1 / t - 1 / 298.15))  # noqa: E731
    full = {"units": {"pressure": "kPa", "loading": "mol/kg"}, "batch_label": "full",
            "conditions": {"reference_pressures_kpa": [15, 100], "adsorption_temperature_k": 298.15,
                           "desorption_temperature_k": 323.15},
            "mixtures": [{"components": ["CO2", "N2"], "mole_fractions": [0.15, 0.85],
                          "total_pressure_bar": 1.0, "temperature_k": 298.15}],
            "isotherms": [isotherm(s, gas, t, q, heat(b * (1 + k), t), surface_area_m2_per_g=900.0)
                          for k, s in enumerate(("RD-A", "RD-B"))
                          for gas, q, b in (("CO2", 4.0, 0.04), ("N2", 2.0, 0.002))
                          for t in (298.15, 323.15)]}
    # no label, no surface area, no second branch, no mixture: every text
    # column that can be empty is empty for the whole batch
    bare = {"units": {"pressure": "kPa", "loading": "mol/kg"},
            "conditions": {"reference_pressures_kpa": [10]},
            "isotherms": [isotherm("RD-C", "CO2", 298.15, 3.0, 0.05),
                          isotherm("RD-D", "CO2", 298.15, 5.0, 0.01)]}
    down = list(reversed(PRESSURES_KPA))
    branches = {"units": {"pressure": "kPa", "loading": "mol/kg"}, "batch_label": "branches",
                "conditions": {"reference_pressures_kpa": [5, 50, 250]},
                # N2 was not measured: an IAST row of nulls (and its flag)
                "mixtures": [{"sorbent_id": "RD-E", "components": ["CO2", "N2"],
                              "mole_fractions": [0.5, 0.5],
                              "total_pressure_bar": 1.0, "temperature_k": 298.15}],
                "isotherms": [isotherm("RD-E", "CO2", 298.15, 4.0, 0.03, branch="adsorption"),
                              {"sorbent_id": "RD-E", "adsorbate": "CO2", "temperature_k": 298.15,
                               "branch": "desorption", "pressure": down,
                               "loading": [q * 1.1 for q in langmuir(4.0, 0.03, down)]}]}
    one_ref = {"units": {"pressure": "kPa", "loading": "mol/kg"}, "batch_label": "one ref",
               "conditions": {"reference_pressures_kpa": [2.5]},
               "isotherms": [isotherm("RD-F", "N2", 298.15, 2.5, 0.004)]}
    return [full, bare, branches, one_ref]


@pytest.fixture(scope="module")
def store_root(tmp_path_factory):
    base = tmp_path_factory.mktemp("readers")
    data_dir = base / "data"
    env = clean_env(SORBRANK_DATA_DIR=str(data_dir), SORBRANK_CHUNK_SIZE="3",
                    SORBRANK_EMBEDDED_WORKERS="1", PYTHONPATH=str(ROOT))
    procs = []
    try:
        _, url = start_server(env, base / "logs", procs)
        client = Client(url)
        for doc in batches():
            reply = client.post_batch(json.dumps(doc).encode(), "application/json")
            assert not reply.get("rejected"), reply
            status = client.wait(reply["batch_id"], timeout_s=600)
            assert status["state"] == "done", status
    finally:
        for proc in reversed(procs):
            proc.stop()
    return data_dir


def glob_of(root: Path, table: str) -> str:
    return str(root / table / "*" / "*.parquet")


# -- each reader, plainly ----------------------------------------------------------

def read_pandas(root: Path, table: str):
    import pandas

    frame = pandas.read_parquet(root / table)
    assert isinstance(frame[PARTITION_COLUMN].dtype, pandas.CategoricalDtype)
    assert all(isinstance(c, str) for c in frame[PARTITION_COLUMN].cat.categories)
    return list(frame.columns), frame.to_dict("records")


def read_polars(root: Path, table: str):
    import polars

    frame = polars.scan_parquet(glob_of(root, table), hive_partitioning=True).collect()
    assert frame.schema[PARTITION_COLUMN] == polars.String
    assert polars.Null not in frame.schema.values()
    return frame.columns, frame.to_dicts()


def read_pyarrow(root: Path, table: str):
    data = ds.dataset(str(root / table), format="parquet", partitioning="hive").to_table()
    assert data.schema.field(PARTITION_COLUMN).type == pa.string()
    assert not any(pa.types.is_null(f.type) for f in data.schema)
    return data.column_names, data.to_pylist()


def read_duckdb(root: Path, table: str):
    import duckdb

    con = duckdb.connect()
    query = f"SELECT * FROM read_parquet('{glob_of(root, table)}', hive_partitioning = true)"
    types = {row[0]: row[1] for row in con.execute(f"DESCRIBE {query}").fetchall()}
    assert types[PARTITION_COLUMN] == "VARCHAR"
    assert '"NULL"' not in types.values() and "NULL" not in types.values()
    data = con.sql(query).to_arrow_table()
    return data.column_names, data.to_pylist()


READERS = {"pandas": read_pandas, "polars": read_polars, "pyarrow.dataset": read_pyarrow,
           "duckdb": read_duckdb}


def canonical(value):
    """One form for what every reader hands back: None for null and NaN,
    tuples for lists, UTC ISO text for timestamps, plain Python numbers."""
    if value is None:
        return None
    if isinstance(value, (np.ndarray, list, tuple)):
        return tuple(canonical(v) for v in value)
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float):
        return None if math.isnan(value) else value
    if hasattr(value, "to_pydatetime"):
        value = value.to_pydatetime()
    if isinstance(value, dt.datetime):
        return value.astimezone(dt.timezone.utc).isoformat()
    return value


def rows_of(columns: list[str], records: list[dict]) -> list[tuple]:
    order = sorted(columns)
    rows = [tuple(canonical(r[c]) for c in order) for r in records]
    return sorted(rows, key=repr)


@pytest.mark.parametrize("table", TABLES)
def test_every_reader_gives_the_same_rows(store_root, table):
    results = {name: read(store_root, table) for name, read in READERS.items()}
    expected_columns = {PARTITION_COLUMN, *declared(table).names}
    for name, (columns, _) in results.items():
        assert set(columns) == expected_columns, (name, set(columns) ^ expected_columns)
    base_columns, base_records = results["pyarrow.dataset"]
    want = rows_of(base_columns, base_records)
    assert len(want) > 0
    assert len({r[sorted(base_columns).index(PARTITION_COLUMN)] for r in want}) >= (
        2 if table == "sorbents" else 4)
    for name, (columns, records) in results.items():
        got = rows_of(columns, records)
        assert len(got) == len(want), name
        for a, b in zip(got, want):
            assert a == b, (name, [(c, x, y) for c, x, y in zip(sorted(columns), a, b) if x != y])


def test_the_store_holds_what_the_readers_are_tested_on(store_root):
    """The cases that broke readers before are really in the store."""
    import pyarrow.parquet as pq

    summaries = ds.dataset(str(store_root / "summaries"), format="parquet",
                           partitioning="hive").to_table()
    by_batch = {}
    for row in summaries.to_pylist():
        by_batch.setdefault(row["batch_id"], set()).add(tuple(row["reference_pressures_pa"]))
    assert sorted(p for s in by_batch.values() for p in s) == sorted(
        [(2_500.0,), (10_000.0,), (15_000.0, 100_000.0), (5_000.0, 50_000.0, 250_000.0)])
    # a text column empty in one batch's files and filled in another's (the
    # version-2 writer typed it null there), one type in both
    sources = {b: {r["surface_area_source"] for r in rows}
               for b, rows in _group(summaries.to_pylist()).items()}
    assert {None} in sources.values() and {"given"} in sources.values()
    hysteresis = summaries["hysteresis_desorption_isotherm_id"].to_pylist()
    assert any(v is not None for v in hysteresis) and any(v is None for v in hysteresis)
    for table in TABLES:
        for path in (store_root / table).glob("*/*.parquet"):
            assert pq.read_schema(path).remove_metadata().equals(
                declared(table).remove_metadata()), path
    # the selected Langmuir loading at each reference pressure, recomputed
    fits = ds.dataset(str(store_root / "fits"), format="parquet", partitioning="hive").to_table()
    chosen = {(r["batch_id"], r["isotherm_id"]): r for r in fits.to_pylist()
              if r["selected"] and r["model"] == "langmuir"}
    checked = 0
    for row in summaries.to_pylist():
        fit = chosen.get((row["batch_id"], row["isotherm_id"]))
        if fit is None:
            continue
        q, b = fit["param_q_sat"], fit["param_affinity"]
        want = [q * b * p / (1 + b * p) for p in row["reference_pressures_pa"]]
        np.testing.assert_allclose(row["reference_loadings_mol_per_kg"], want, rtol=1e-9)
        checked += 1
    assert checked >= 3


def _group(rows: list[dict]) -> dict[str, list[dict]]:
    out: dict[str, list[dict]] = {}
    for row in rows:
        out.setdefault(row["batch_id"], []).append(row)
    return out
