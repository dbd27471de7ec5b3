"""Rankings on kept key columns equal a plain recomputation; the store and
ingest benchmarks keep running (tiny sizes, no time or rate asserted)."""
from __future__ import annotations

import json
import math
import random
import shutil
import subprocess
import sys
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pyarrow as pa
import pytest

from sorbrank.worker.store import RankingQuery, Store, new_batch_id, rankings
from sorbrank.worker.store.rankings import _rank_whole_rows

ROOT = Path(__file__).resolve().parents[2]
T0 = datetime(2025, 3, 1, tzinfo=timezone.utc)
FLAGS = [[], ["at_bound"], ["ambiguous", "at_bound"], ["ambiguous"], None, ["q_sat_from_other_model"]]


def rows_for(seed: int, n: int) -> list[dict]:
    rng = random.Random(seed)
    rows = []
    for i in range(n):
        q = rng.choice([None, float("nan")] + [round(rng.uniform(0, 10), 3) for _ in range(8)])
        rows.append({
            "isotherm_id": f"iso-{rng.randrange(40):02d}-{seed}-{i}",  # not in key order
            "sorbent_id": f"M{rng.randrange(5)}",
            "adsorbate": rng.choice(["CO2", "N2", "CH4"]),
            "branch": rng.choice(["adsorption", "adsorption", "desorption"]),
            # 297.5 and 298.5 round half to even, as pc.round and round() do
            "temperature_k": rng.choice([273.15, 298.15, 297.5, 298.5, 298.0, 313.15]),
            "q_sat_mol_per_kg": q,
            "henry_mol_per_kg_pa": rng.choice([None, rng.uniform(1e-6, 1e-4)]),
            "loading_ads_mol_per_kg": q,   # the default sort
            "quality_flags": rng.choice(FLAGS),
        })
    return rows


def write(store: Store, batch_id: str, accepted: datetime, rows: list[dict], chunk: int) -> None:
    table = pa.Table.from_pylist(rows).append_column(
        "accepted_at", pa.array([accepted] * len(rows), pa.timestamp("us", tz="UTC")))
    store.write_table("summaries", batch_id, chunk, table)


def build(tmp_path: Path, batches: int = 5):
    store = Store(tmp_path)
    stored = []
    for k in range(batches):
        # batches 1 and 2 share an acceptance time: the larger batch id wins
        accepted = T0 + timedelta(minutes=min(k, 1) if k < 3 else k)
        batch_id = new_batch_id(accepted)
        rows = rows_for(100 + k, 30)
        write(store, batch_id, accepted, rows[:10], 0)
        write(store, batch_id, accepted, rows[10:], 1)
        stored.append((batch_id, accepted, rows))
    return store, stored


def brute_force(stored, query: RankingQuery):
    """The documented rules restated in plain Python: (page ids, total)."""
    rows = [{**r, "batch_id": b, "accepted_at": a} for b, a, batch_rows in stored for r in batch_rows]
    if query.batch_id is not None:
        rows = [r for r in rows if r["batch_id"] == query.batch_id]
    if query.sorbent_id is not None:
        rows = [r for r in rows if r["sorbent_id"] == query.sorbent_id]
    if query.adsorbate is not None:
        rows = [r for r in rows if r["adsorbate"] == query.adsorbate]
    if query.temperature_k is not None:
        tol = abs(query.temperature_tolerance_k)
        rows = [r for r in rows
                if query.temperature_k - tol <= r["temperature_k"] <= query.temperature_k + tol]
    if not query.all_results:
        ordered = sorted(rows, key=lambda r: r["isotherm_id"])
        ordered.sort(key=lambda r: (r["accepted_at"], r["batch_id"]), reverse=True)
        first = {}
        for r in ordered:
            first.setdefault((r["sorbent_id"], r["adsorbate"], round(r["temperature_k"]),
                              r["branch"]), r)
        rows = list(first.values())
    want, avoid = set(query.flags), set(query.exclude_flags)
    rows = [r for r in rows if want <= set(r["quality_flags"] or []) and not avoid & set(r["quality_flags"] or [])]

    def value(r):
        v = r[query.sort]
        return None if v is None or (isinstance(v, float) and math.isnan(v)) else v

    present = [r for r in rows if value(r) is not None]
    missing = [r for r in rows if value(r) is None]
    present.sort(key=lambda r: (r["sorbent_id"], r["isotherm_id"]))
    present.sort(key=value, reverse=query.descending)
    return ([(r["batch_id"], r["isotherm_id"]) for r in present],
            {(r["batch_id"], r["isotherm_id"]) for r in missing}, len(rows))


def same(a: pa.Table, b: pa.Table) -> bool:
    """Equal schemas (with metadata) and equal rows, NaN equal to NaN."""
    def rows(t):
        return [{k: "NaN" if isinstance(v, float) and math.isnan(v) else v for k, v in r.items()}
                for r in t.to_pylist()]
    return a.schema.equals(b.schema, check_metadata=True) and rows(a) == rows(b)


def whole_rows(store: Store, query: RankingQuery) -> tuple[pa.Table, int]:
    """The whole-row path over the dataset Store.dataset discovers."""
    import pyarrow.dataset as ds

    data = store.dataset("summaries")
    where = []
    if query.batch_id is not None:
        where.append(ds.field("batch_id") == query.batch_id)
    if query.sorbent_id is not None:
        where.append(ds.field("sorbent_id") == query.sorbent_id)
    if query.adsorbate is not None:
        where.append(ds.field("adsorbate") == query.adsorbate)
    if query.temperature_k is not None:
        tol = abs(query.temperature_tolerance_k)
        where.append((ds.field("temperature_k") >= query.temperature_k - tol)
                     & (ds.field("temperature_k") <= query.temperature_k + tol))
    expr = None
    for w in where:
        expr = w if expr is None else expr & w
    return _rank_whole_rows(data.to_table(filter=expr), query)


QUERIES = [
    RankingQuery(limit=1000),
    RankingQuery(limit=1000, all_results=True),
    RankingQuery(limit=7, offset=3, adsorbate="CO2", temperature_k=298.0),
    RankingQuery(limit=1000, adsorbate="N2", temperature_k=298.15, temperature_tolerance_k=-0.7),
    RankingQuery(limit=1000, sort="henry_mol_per_kg_pa", descending=False),
    RankingQuery(limit=1000, flags=("ambiguous",), exclude_flags=("at_bound",)),
    RankingQuery(limit=1000, exclude_flags=("ambiguous",), sorbent_id="M2"),
    RankingQuery(limit=1000, sort="temperature_k", flags=("at_bound",), all_results=True),
    RankingQuery(limit=1000, sort="sorbent_id", descending=False, adsorbate="CH4"),
    RankingQuery(limit=0, adsorbate="CO2"),
]


@pytest.mark.parametrize("query", QUERIES, ids=[f"q{i}" for i in range(len(QUERIES))])
def test_rankings_equal_a_plain_recomputation_and_the_whole_row_path(tmp_path, query):
    store, stored = build(tmp_path)
    for repeat in range(2):  # the second query runs on kept columns
        page, total = rankings(store, query)
        present, missing, expected_total = brute_force(stored, query)
        assert total == expected_total
        got = list(zip(page["batch_id"].to_pylist(), page["isotherm_id"].to_pylist()))
        expected_all = present + sorted(missing)  # missing values: any order, at the end
        window = slice(query.offset, query.offset + query.limit)
        assert got[:len(present[window])] == present[window]
        assert set(got[len(present[window]):]) <= missing
        assert len(got) == len(expected_all[window])
        reference, reference_total = whole_rows(store, query)
        assert reference_total == total
        assert same(page, reference), repeat


def test_batch_filter_and_every_batch(tmp_path):
    store, stored = build(tmp_path)
    for batch_id, _, _ in stored:
        query = RankingQuery(limit=1000, batch_id=batch_id, sort="q_sat_mol_per_kg")
        page, total = rankings(store, query)
        present, missing, expected_total = brute_force(stored, query)
        assert total == expected_total and set(page["batch_id"].to_pylist()) <= {batch_id}
        assert same(page, whole_rows(store, query)[0])


def test_new_replaced_removed_and_damaged_files_are_seen_by_the_next_query(tmp_path):
    store, stored = build(tmp_path, batches=3)
    query = RankingQuery(limit=1000, all_results=True)
    assert rankings(store, query)[1] == 90
    # a new batch with a text column empty in one chunk (written as a typed
    # null, never as type null: worker/store/schema.py) and filled in the next
    late = T0 + timedelta(hours=1)
    batch_id = new_batch_id(late)
    extra = rows_for(900, 6)
    for r in extra:
        r["surface_area_source"] = None
    write(store, batch_id, late, extra[:3], 0)
    assert rankings(store, query)[1] == 93
    for r in extra:
        r["surface_area_source"] = "given"
    write(store, batch_id, late, extra[3:], 1)
    page, total = rankings(store, query)
    assert total == 96 and page.schema.field("surface_area_source").type == pa.string()
    assert same(page, whole_rows(store, query)[0])
    # a retried job replaces its chunk: the new content is what ranks
    replaced = [{**r, "q_sat_mol_per_kg": 99.0 + k} for k, r in enumerate(extra[:3])]
    write(store, batch_id, late, replaced, 0)
    top = rankings(store, RankingQuery(limit=3, all_results=True, sort="q_sat_mol_per_kg"))[0]
    assert top["q_sat_mol_per_kg"].to_pylist() == [101.0, 100.0, 99.0]
    # a damaged file and a dot-file are ignored; a removed batch disappears
    partition = store.table_path("summaries", batch_id, 0).parent
    (partition / "chunk-00007.parquet").write_bytes(b"PAR1 not really")
    (partition / ".chunk-00008.parquet.tmp").write_bytes(b"half")
    assert rankings(store, query)[1] == 96
    shutil.rmtree(partition)
    page, total = rankings(store, query)
    assert total == 90 and same(page, whole_rows(store, query)[0])


def test_inputs_table_built_by_columns_equals_the_row_by_row_table():
    import io

    import pyarrow.parquet as pq

    from sorbrank.worker.intake import read_batch
    from sorbrank.worker.store import isotherms_to_table
    from sorbrank.worker.store.inputs import _isotherms_to_table_by_rows

    # three isotherms in three unit pairs, one with per-point sigma, one with a repeated pressure
    doc = {"isotherms": [
        {"sorbent_id": "M1", "adsorbate": "CO2", "temperature_k": 298.15,
         "units": {"pressure": "kPa", "loading": "mmol/g"},
         "pressure": [1, 3, 7, 15, 40, 90],
         "loading": [round(0.1 * p / (1 + 0.01 * p), 6) for p in (1, 3, 7, 15, 40, 90)],
         "loading_sigma": [0.01] * 6},
        {"sorbent_id": "M2", "adsorbate": "N2", "temperature_k": 77.3,
         "units": {"pressure": "kPa", "loading": "mol/kg"},
         "pressure": [1, 2, 4, 8], "loading": [1, 2, 4, 8]},
        {"sorbent_id": "M3", "adsorbate": "CH4", "temperature_k": 273.15,
         "units": {"pressure": "bar", "loading": "mol/kg"},
         "pressure": [1, 2, 2, 4, 8], "loading": [p / 3 for p in (1, 2, 2, 4, 8)]},
    ]}
    isotherms = read_batch(json.dumps(doc), "json", batch_label="columns").isotherms
    assert len(isotherms) == 3
    for subset in (isotherms, isotherms[:1], isotherms[1:], []):
        by_columns, by_rows = isotherms_to_table(subset), _isotherms_to_table_by_rows(subset)
        assert by_columns.equals(by_rows)
        assert by_columns.schema.equals(by_rows.schema, check_metadata=True)
        a, b = io.BytesIO(), io.BytesIO()
        pq.write_table(by_columns, a)
        pq.write_table(by_rows, b)
        assert a.getvalue() == b.getvalue()  # the same bytes on disk


# -- the benchmarks at tiny sizes ----------------------------------------------

def run(script: str, *args: str, timeout: int = 600) -> str:
    proc = subprocess.run([sys.executable, str(ROOT / "benchmarks" / script), *args],
                          capture_output=True, text=True, timeout=timeout)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    return proc.stdout


def test_bench_rankings_runs_at_a_tiny_size(tmp_path):
    out = run("bench_rankings.py", "--rows", "3000", "--batches", "6", "--chunks", "2",
              "--repeats", "1", "--dir", str(tmp_path / "store"))
    for label in ("store    :", "  main :", "  flag :", "  all  :", "  wide :", "rankings :",
                  "http     :", "fresh    : a new batch of 10 rows is seen by the next query: yes",
                  "result   : OK"):
        assert label in out, out
    assert "same page: NO" not in out and out.count("same page: yes") == 4, out
    again = run("bench_rankings.py", "--rows", "3000", "--batches", "6", "--chunks", "2",
                "--repeats", "1", "--dir", str(tmp_path / "store"), "--no-http",
                "--baseline", "none")
    assert "; reused" in again and "result   : OK" in again, again


@pytest.mark.integration
def test_bench_ingest_runs_at_a_tiny_size():
    out = run("bench_ingest.py", "--isotherms", "60", "--posts", "2", "--e2e-batches", "2",
              "--e2e-chunk-sizes", "7,30", "--timeout-s", "300")
    for label in ("data     :", "accepted :", "isotherms/s", "SORBRANK_CHUNK_SIZE=7:",
                  "SORBRANK_CHUNK_SIZE=30:", "ratio    : end to end, chunks of 30 / chunks of 7",
                  "stopped  :", "result   : OK"):
        assert label in out, out
    assert out.count("end-to-end:") == 2, out
