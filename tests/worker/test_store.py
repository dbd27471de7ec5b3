"""The Parquet store: atomic deterministic writes, schema version, rankings."""
from __future__ import annotations

import io
import json
import random
from datetime import datetime, timedelta, timezone

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from sorbrank.worker.intake import read_batch
from sorbrank.worker.store import (
    SCHEMA_VERSION, SCHEMA_VERSION_KEY, TABLES, RankingQuery, Store, atomic_write, is_batch_id,
    isotherms_to_table, new_batch_id, rankings, table_to_isotherms,
)

T0 = datetime(2025, 1, 1, tzinfo=timezone.utc)


def summary_rows(n, *, seed, sorbents=6, adsorbates=("CO2", "N2"), temps=(273.15, 298.15)):
    rng = random.Random(seed)
    rows = []
    for i in range(n):
        rows.append({
            "isotherm_id": f"iso-{seed}-{i}",
            "sorbent_id": f"M{rng.randrange(sorbents)}",
            "adsorbate": rng.choice(adsorbates),
            "temperature_k": rng.choice(temps) + rng.choice([0.0, 0.1, -0.2]),
            "q_sat_mol_per_kg": rng.choice([None, float("nan")] + [rng.uniform(0, 10)] * 8),
            "q_sat_stderr_mol_per_kg": rng.choice([None, rng.uniform(0, 1), rng.uniform(0, 5)]),
            "henry_mol_per_kg_pa": rng.uniform(1e-6, 1e-4),
            "loading_ads_mol_per_kg": rng.choice([None, float("nan")] + [rng.uniform(0, 5)] * 8),
            "quality_flags": rng.choice([[], ["at_bound"], ["ambiguous", "at_bound"], ["ambiguous"],
                                 ["extrapolated_adsorption_pressure"],
                                 ["capacity_extrapolated", "ambiguous"]]),
        })
    return rows


def write_summaries(store, batch_id, accepted_at, rows, chunk=0):
    table = pa.Table.from_pylist(rows).append_column(
        "accepted_at", pa.array([accepted_at] * len(rows), pa.timestamp("us", tz="UTC")))
    store.write_table("summaries", batch_id, chunk, table)


def test_batch_ids_are_strict_and_never_paths(tmp_path):
    store = Store(tmp_path)
    good = new_batch_id()
    assert is_batch_id(good)
    for bad in ["../etc", "b-..", good + "/..", "/" + good, good + "\n", "", "B" + good[1:]]:
        assert not is_batch_id(bad)
        with pytest.raises(ValueError):
            store.batch_dir(bad)
        with pytest.raises(ValueError):
            store.table_path("summaries", bad, 0)
    with pytest.raises(ValueError):
        store.read_idempotency("../../x")


def test_atomic_write_failing_half_way_leaves_nothing(tmp_path):
    target = tmp_path / "sub" / "chunk-00000.parquet"

    def write_then_fail(fh):
        fh.write(b"half a file")
        raise OSError("disk full")

    with pytest.raises(OSError):
        atomic_write(target, write_then_fail)
    assert not target.exists()
    assert list(target.parent.iterdir()) == []


def test_rewrite_replaces_same_file_and_records_schema_version(tmp_path):
    store = Store(tmp_path)
    batch_id = new_batch_id()
    rows = summary_rows(5, seed=1)
    write_summaries(store, batch_id, T0, rows)
    first = store.table_path("summaries", batch_id, 0).read_bytes()
    write_summaries(store, batch_id, T0, rows)  # a retried job
    files = [p.name for p in store.table_path("summaries", batch_id, 0).parent.iterdir()]
    assert files == ["chunk-00000.parquet"]
    assert store.table_path("summaries", batch_id, 0).read_bytes() == first
    meta = pq.read_schema(store.table_path("summaries", batch_id, 0)).metadata
    assert meta[SCHEMA_VERSION_KEY] == SCHEMA_VERSION.encode()
    assert store.batch_table("summaries", batch_id).num_rows == 5


def test_partial_temp_file_never_appears_in_results_or_rankings(tmp_path):
    store = Store(tmp_path)
    batch_id = new_batch_id()
    write_summaries(store, batch_id, T0, summary_rows(4, seed=2))
    partition = store.table_path("summaries", batch_id, 0).parent
    # what a writer killed mid-write leaves: a truncated dot-temp file
    good = store.table_path("summaries", batch_id, 0).read_bytes()
    (partition / ".chunk-00001.parquet.x1y2.tmp").write_bytes(good[: len(good) // 2])
    # and a complete one not yet renamed: must stay invisible too
    (partition / ".chunk-00002.parquet.a1b2.tmp").write_bytes(good)
    assert store.batch_table("summaries", batch_id).num_rows == 4
    page, total = rankings(store, RankingQuery(all_results=True, limit=1000))
    assert total == 4 and page.num_rows == 4


def test_chunks_with_all_null_columns_merge_with_typed_ones(tmp_path):
    store = Store(tmp_path)
    a, b = new_batch_id(T0), new_batch_id(T0 + timedelta(seconds=1))
    rows_a = summary_rows(3, seed=3)
    for r in rows_a:
        r["q_sat_mol_per_kg"] = None  # pyarrow infers the null type for this column
    write_summaries(store, a, T0, rows_a)
    write_summaries(store, b, T0 + timedelta(seconds=1), summary_rows(3, seed=4))
    assert store.query("summaries").num_rows == 6


def test_isotherms_round_trip_exactly_through_the_inputs_table():
    csv = "\n".join(["sorbent_id,adsorbate,temperature_k,pressure_kpa,loading_mmol_per_g,"
                     "loading_sigma"]
                    + [f"M1,CO2,298.15,{p},{0.1 * p / (1 + 0.01 * p):.6f},0.01"
                       for p in (1, 3, 7, 15, 40, 90)]
                    + [f"M2,N2,77.3,{p},{p}," for p in (1, 2, 4, 8)])
    batch = read_batch(csv, "csv", batch_label="roundtrip")
    assert len(batch.isotherms) == 2
    back = table_to_isotherms(isotherms_to_table(batch.isotherms))
    for before, after in zip(batch.isotherms, back):
        for name in ("isotherm_id", "sorbent_id", "adsorbate", "temperature_k", "branch",
                     "saturation_pressure_pa", "surface_area_m2_per_g", "batch_label", "flags"):
            assert getattr(after, name) == getattr(before, name), name
        # the audit copy comes back as plain JSON values (arrays as lists)
        as_json = json.loads(json.dumps(before.original, default=lambda v: v.tolist()))
        assert after.original == as_json
        for name in ("pressure_pa", "loading_mol_per_kg", "sigma_mol_per_kg"):
            b, a = getattr(before, name), getattr(after, name)
            assert (a is None) == (b is None)
            if a is not None:
                assert np.array_equal(a, b)


def brute_force_rankings(batches, query: RankingQuery):
    """Plain-Python restatement of the ranking rules, for comparison."""
    rows = []
    for batch_id, accepted_at, batch_rows in batches:
        for r in batch_rows:
            rows.append({**r, "batch_id": batch_id, "accepted_at": accepted_at})
    if query.adsorbate is not None:
        rows = [r for r in rows if r["adsorbate"] == query.adsorbate]
    if query.temperature_k is not None:
        rows = [r for r in rows
                if abs(r["temperature_k"] - query.temperature_k) <= query.temperature_tolerance_k]
    if not query.all_results:
        # newest batch first; inside one batch the smallest isotherm id
        ordered = sorted(rows, key=lambda r: r["isotherm_id"])
        ordered.sort(key=lambda r: (r["accepted_at"], r["batch_id"]), reverse=True)
        first = {}
        for r in ordered:
            first.setdefault((r["sorbent_id"], r["adsorbate"], round(r["temperature_k"])), r)
        rows = list(first.values())
    rows = [r for r in rows if set(query.flags) <= set(r["quality_flags"])
            and not set(query.exclude_flags) & set(r["quality_flags"])]

    def value(r):
        v = r[query.sort]
        return None if v is None or v != v else v

    def demoted(r):
        """The documented reliability rules, restated (docs/results.md, "Default ranking")."""
        if not query.unreliable_last:
            return False
        if query.sort == "loading_ads_mol_per_kg":
            return "extrapolated_adsorption_pressure" in r["quality_flags"]
        if query.sort == "q_sat_mol_per_kg":
            q, se = r["q_sat_mol_per_kg"], r["q_sat_stderr_mol_per_kg"]
            return "capacity_extrapolated" in r["quality_flags"] or se is None or not se <= 0.25 * q
        return False

    present = [r for r in rows if value(r) is not None]
    missing = [r for r in rows if value(r) is None]
    present.sort(key=lambda r: (demoted(r), -value(r) if query.descending else value(r),
                                r["sorbent_id"], r["isotherm_id"]))
    return [(r["batch_id"], r["isotherm_id"]) for r in present], len(rows), missing


@pytest.mark.parametrize("query", [
    RankingQuery(limit=1000),
    RankingQuery(limit=1000, all_results=True),
    RankingQuery(limit=1000, adsorbate="CO2", temperature_k=298.0),
    RankingQuery(limit=1000, sort="henry_mol_per_kg_pa", descending=False),
    RankingQuery(limit=1000, flags=("ambiguous",), exclude_flags=("at_bound",)),
    RankingQuery(limit=1000, sort="q_sat_mol_per_kg"),
    RankingQuery(limit=1000, sort="q_sat_mol_per_kg", unreliable_last=False),
    RankingQuery(limit=1000, unreliable_last=False, all_results=True),
    RankingQuery(limit=1000, sort="q_sat_mol_per_kg", adsorbate="CO2", temperature_k=298.0),
])
def test_rankings_match_brute_force_latest_wins(tmp_path, query):
    store = Store(tmp_path)
    batches = []
    for k in range(4):
        accepted = T0 + timedelta(minutes=k)
        batch_id = new_batch_id(accepted)
        rows = summary_rows(25, seed=10 + k)
        # two chunks per batch, as jobs write them
        write_summaries(store, batch_id, accepted, rows[:12], chunk=0)
        write_summaries(store, batch_id, accepted, rows[12:], chunk=1)
        batches.append((batch_id, accepted, rows))
    page, total = rankings(store, query)
    expected, expected_total, missing = brute_force_rankings(batches, query)
    assert total == expected_total
    got = list(zip(page["batch_id"].to_pylist(), page["isotherm_id"].to_pylist()))
    assert got[:len(expected)] == expected
    assert sorted(got[len(expected):]) == sorted((r["batch_id"], r["isotherm_id"]) for r in missing)
    if not query.all_results:
        keys = [(m, a, round(t)) for m, a, t in zip(page["sorbent_id"].to_pylist(),
                                                    page["adsorbate"].to_pylist(),
                                                    page["temperature_k"].to_pylist())]
        assert len(keys) == len(set(keys))


def test_rankings_paging_and_unknown_sort_column(tmp_path):
    store = Store(tmp_path)
    batch_id = new_batch_id(T0)
    write_summaries(store, batch_id, T0, summary_rows(30, seed=7))
    everything, total = rankings(store, RankingQuery(all_results=True, limit=1000))
    page, same_total = rankings(store, RankingQuery(all_results=True, limit=5, offset=10))
    assert same_total == total == 30
    assert page["isotherm_id"].to_pylist() == everything["isotherm_id"].to_pylist()[10:15]
    with pytest.raises(ValueError, match="cannot sort by 'no_such_column'"):
        rankings(store, RankingQuery(sort="no_such_column"))
    with pytest.raises(ValueError, match="cannot sort by 'quality_flags'"):
        rankings(store, RankingQuery(sort="quality_flags"))


def test_empty_store_ranks_nothing(tmp_path):
    page, total = rankings(Store(tmp_path / "nothing-here"), RankingQuery())
    assert total == 0 and page.num_rows == 0


def test_manifest_json_is_atomic_and_listed_newest_first(tmp_path):
    store = Store(tmp_path)
    ids = [new_batch_id(T0 + timedelta(seconds=s)) for s in (5, 1, 9)]
    for batch_id in ids:
        store.write_manifest({"batch_id": batch_id})
    (store.root / "batches" / "not-a-batch").mkdir()
    (store.batch_dir(ids[0]) / ".manifest.json.zz.tmp").write_text("{broken")
    assert store.batch_ids() == sorted(ids, reverse=True)
    assert json.loads((store.batch_dir(ids[0]) / "manifest.json").read_text()) == {"batch_id": ids[0]}


# -- jobs on the store: chunking, re-runs, reconcile -------------------------------

def test_chunks_keep_each_sorbent_together():
    from sorbrank.worker.jobs import plan_chunks

    rng = random.Random(5)
    sorbents = [f"M{rng.randrange(12)}" for _ in range(60)]
    for size in (1, 3, 7, 500):
        chunks = plan_chunks(sorbents, size)
        assert sorted(p for c in chunks for p in c) == list(range(60))
        owner = {}
        for k, chunk in enumerate(chunks):
            for position in chunk:
                assert owner.setdefault(sorbents[position], k) == k
            # a chunk only exceeds the size when one sorbent alone does
            assert len(chunk) <= size or len({sorbents[p] for p in chunk}) == 1
    with pytest.raises(ValueError):
        plan_chunks(sorbents, 0)


def small_batch(sorbents=("J1", "J2", "J3")):
    from conftest import isotherm

    lines = ["sorbent_id,adsorbate,temperature_k,pressure_kpa,loading_mol_per_kg"]
    for iso in [isotherm(m, 1.0 + k, 0.1, t) for k, m in enumerate(sorbents)
                for t in (273.15, 298.15)]:
        lines += [f"{iso['sorbent_id']},{iso['adsorbate']},{iso['temperature_k']},{p},{q}"
                  for p, q in zip(iso["pressure"], iso["loading"])]
    return read_batch("\n".join(lines) + "\n", "csv", batch_label="jobs")


def test_manifest_and_chunk_status_records_read_back_to_the_json_on_disk(tmp_path):
    """Every manifest and chunk status the jobs write -- running, done, failed
    (also one that never started: started_at null), queued again after a
    damaged results file -- reads into its record and back to the same JSON,
    and keys the record does not know survive (a record written by another
    version)."""
    from sorbrank.worker import jobs
    from sorbrank.worker.store.records import ChunkStatus, Manifest

    store = Store(tmp_path)
    manifest = jobs.accept_batch(store, small_batch(), options={"models": ["langmuir"]},
                                 chunk_size=2)
    batch_id = manifest["batch_id"]
    jobs.run_chunk(store, batch_id, 0)
    jobs.record_chunk_failure(store, batch_id, 1, "ValueError: boom")
    store.write_chunk_status(batch_id, 2, {"state": "running", "attempts": 1,
                                           "started_at": "2026-01-01T00:00:00.000000Z"})
    written = {p.name: json.loads(p.read_text()) for p in store.batch_dir(batch_id).glob("*.json")}
    assert {"manifest.json", "chunk-00000.json", "chunk-00001.json"} <= set(written)
    assert written["chunk-00001.json"]["started_at"] is None   # failed before it started
    assert written["chunk-00000.json"]["state"] == "done"
    for name, data in written.items():
        record = (Manifest if name == "manifest.json" else ChunkStatus).from_dict(data)
        assert record.to_dict() == data, name

    store.quarantine(str(store.table_path("summaries", batch_id, 0)), "test: damaged")
    queued = store.read_chunk_statuses(batch_id)[0]
    assert queued == {"state": "queued", "attempts": 0,
                      "refit_after_damage": queued["refit_after_damage"]}
    assert ChunkStatus.from_dict(queued).to_dict() == queued

    newer = {**manifest, "written_by": "a later sorbrank",
             "chunks": [{**c, "note": "kept"} for c in manifest["chunks"]]}
    assert Manifest.from_dict(newer).to_dict() == newer
    assert Manifest.from_dict(newer).chunks[0].extra == {"note": "kept"}


def test_rerunning_a_chunk_rewrites_identical_files_without_duplicates(tmp_path):
    from sorbrank.worker import jobs

    store = Store(tmp_path)
    manifest = jobs.accept_batch(store, small_batch(), options={"models": ["langmuir", "sips"]},
                                 chunk_size=2)
    batch_id = manifest["batch_id"]
    for chunk in manifest["chunks"]:
        jobs.run_chunk(store, batch_id, chunk["index"])
    def table_files():  # the tables' chunk files (an index kept beside them is no table)
        return sorted(p for table in TABLES for p in tmp_path.glob(f"{table}/*/*.parquet"))

    files = table_files()
    before = {p: p.read_bytes() for p in files}
    summaries = store.batch_table("summaries", batch_id)
    jobs.run_chunk(store, batch_id, 1, force=True)  # a re-delivered task
    assert table_files() == files
    for path, data in before.items():
        if data != path.read_bytes():  # byte-identical, or at least row-identical
            assert pq.read_table(path).equals(pq.read_table(io.BytesIO(data)))
    assert store.batch_table("summaries", batch_id).sort_by("isotherm_id").equals(
        summaries.sort_by("isotherm_id"))
    assert store.batch_table("summaries", batch_id).num_rows == 6
    page, total = rankings(store, RankingQuery(all_results=True, limit=100))
    assert total == 6 and len(set(page["isotherm_id"].to_pylist())) == 6
    assert jobs.batch_status(store, batch_id)["state"] == "done"


def test_reconcile_enqueues_exactly_the_unsettled_chunks(tmp_path):
    from sorbrank.worker import jobs

    store = Store(tmp_path)
    manifest = jobs.accept_batch(store, small_batch(), options={"models": ["langmuir"]},
                                 chunk_size=2)
    batch_id = manifest["batch_id"]
    assert len(manifest["chunks"]) == 3
    queued = []
    assert jobs.reconcile(store, lambda b, c: queued.append((b, c))) == queued
    assert queued == [(batch_id, 0), (batch_id, 1), (batch_id, 2)]
    jobs.run_chunk(store, batch_id, 1)
    # a chunk whose worker died mid-way: "running" on disk, not settled
    store.write_chunk_status(batch_id, 2, {"state": "running", "attempts": 1, "started_at": "x"})
    queued.clear()
    jobs.reconcile(store, lambda b, c: queued.append((b, c)))
    assert queued == [(batch_id, 0), (batch_id, 2)]
    assert jobs.batch_status(store, batch_id)["state"] == "running"
    for c in (0, 2):
        jobs.run_chunk(store, batch_id, c)
    queued.clear()
    jobs.reconcile(store, lambda b, c: queued.append((b, c)))
    assert queued == [] and store.read_final(batch_id)["state"] == "done"


def test_a_chunk_that_keeps_dying_is_failed_not_retried_forever(tmp_path):
    from sorbrank.worker import jobs

    store = Store(tmp_path)
    manifest = jobs.accept_batch(store, small_batch(("K1",)), options={"models": ["langmuir"]})
    batch_id = manifest["batch_id"]
    # as left by MAX_ATTEMPTS deliveries killed by the hard time limit
    store.write_chunk_status(batch_id, 0, {"state": "running", "attempts": jobs.MAX_ATTEMPTS})
    with pytest.raises(jobs.AttemptsExhausted):
        jobs.run_chunk(store, batch_id, 0)
    status = jobs.execute_chunk(store, batch_id, 0)
    assert status["state"] == "failed" and "without finishing" in status["errors"][0]["message"]
    with pytest.raises(jobs.UnknownBatch):
        jobs.run_chunk(store, new_batch_id(), 0)


def test_worker_side_never_imports_flask_or_service():
    import subprocess
    import sys

    code = ("import sys, sorbrank.worker.store, sorbrank.worker.jobs, sorbrank.worker.embedded, sorbrank.worker.tasks; "
            "bad = sorted(m for m in sys.modules if m.split('.')[0] in ('flask', 'service')); "
            "print(bad); sys.exit(1 if bad else 0)")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stdout + done.stderr


def test_idempotency_claim_has_exactly_one_winner(tmp_path):
    import hashlib
    from concurrent.futures import ThreadPoolExecutor

    store = Store(tmp_path)
    key_hash = hashlib.sha256(b"client\0key").hexdigest()
    claims = [{"batch_id": new_batch_id(), "n": n} for n in range(16)]
    with ThreadPoolExecutor(8) as pool:
        held = list(pool.map(lambda r: store.claim_idempotency(key_hash, r), claims))
    assert all(h == held[0] for h in held) and held[0] in claims
    assert store.read_idempotency(key_hash) == held[0]
    assert [p.name for p in (tmp_path / "idempotency").iterdir()] == [f"{key_hash}.json"]


def test_sorbent_rows_of_every_kind_keep_all_their_fields():
    # an isosteric-heat row first, then an IAST row with other fields: the stored
    # table must carry the union, not only the first row's keys
    from sorbrank.worker.jobs import sorbent_rows_table

    rows = [{"kind": "isosteric_heat", "sorbent_id": "M", "adsorbate": "CO2",
             "isosteric_heat_j_per_mol": 30000.0},
            {"kind": "iast", "sorbent_id": "M", "adsorbate": "CO2/N2", "temperature_k": 298.15,
             "total_pressure_pa": 1e5, "selectivity": 40.0}]
    table = sorbent_rows_table(rows)
    back = table.to_pylist()
    assert back[1]["selectivity"] == 40.0 and back[1]["temperature_k"] == 298.15
    assert back[0]["selectivity"] is None and back[0]["isosteric_heat_j_per_mol"] == 30000.0


@pytest.mark.parametrize("seed", range(6))
def test_latest_wins_on_integer_codes_picks_the_rows_the_full_sort_picks(seed):
    """The fast latest-wins (integer codes, isotherm ids compared only between
    rows tied on everything else) against the plain three-key sort it
    replaces, on random tables crowded with ties: equal acceptance times,
    several rows of one group in one batch, equal isotherm ids, nulls in
    every key (common practice for checking an optimisation: same rows,
    any input)."""
    from sorbrank.worker.store.latest import latest_rows, latest_wins_by_sorting

    rng = np.random.default_rng(seed)
    n = 3000

    def pick(values, null_share=0.05):
        out = [values[i] for i in rng.integers(0, len(values), n)]
        return [None if rng.random() < null_share else v for v in out]

    base = datetime(2026, 1, 1, tzinfo=timezone.utc)
    table = pa.table({
        "sorbent_id": pa.array(pick([f"m{i}" for i in range(40)])),
        "adsorbate": pa.array(pick(["CO2", "N2", "CH4"])),
        "temperature_k": pa.array([None if rng.random() < 0.03 else float(v)
                                   for v in rng.choice([273.15, 273.4, 298.15, 298.6, 313.15], n)]),
        "branch": pa.array(pick(["adsorption", "desorption"])),
        "accepted_at": pa.array(pick([base + timedelta(seconds=int(s)) for s in range(5)]),
                                pa.timestamp("us", tz="UTC")),
        "batch_id": pa.array(pick([f"b{i}" for i in range(8)])),
        "isotherm_id": pa.array(pick([f"i{i}" for i in range(60)])),
        "row": pa.array(np.arange(n)),
    })
    fast = latest_rows(table)
    assert fast is not None
    expected = latest_wins_by_sorting(table)["row"].to_numpy()
    assert sorted(table["row"].to_numpy()[fast].tolist()) == sorted(expected.tolist())
    assert len(fast) == len(expected) and 0 < len(expected) < n


@pytest.mark.parametrize("descending", [True, False])
def test_a_page_sorted_from_its_candidates_is_the_page_of_the_full_sort(descending):
    """Sorting only the rows that can reach the page (values at or beyond the
    page's last, ties kept) against sorting everything, on a float column
    crowded with ties, NaN and nulls, for pages at the start, the middle,
    across the NaN/null tail and past the end (common practice for checking
    an optimisation: same page, any input)."""
    from sorbrank.worker.store.rankings import _page_of, _sorted_for_page

    rng = np.random.default_rng(3)
    n = 2000
    values = rng.choice([0.5, 1.0, 1.0, 2.5, -0.0, 0.0, np.inf, np.nan], n).tolist()
    values = [None if rng.random() < 0.05 else v for v in values]
    table = pa.table({
        "q_sat_mol_per_kg": pa.array(values, pa.float64()),
        "sorbent_id": pa.array([f"m{i}" for i in rng.integers(0, 30, n)]),
        "isotherm_id": pa.array([f"i{i}" for i in rng.integers(0, 400, n)]),
        "batch_id": pa.array([f"b{i}" for i in rng.integers(0, 5, n)]),
    })
    rows = np.sort(rng.choice(n, 1500, replace=False))
    # rows whose figure is unreliable come after the rest (the _demoted helper column)
    demoted = table.append_column("_demoted", pa.array((rng.random(n) < 0.3).astype(np.int8)))
    for offset, limit in ((0, 10), (0, 1), (37, 25), (1300, 100), (1490, 20), (1600, 5),
                          (1000, 30)):
        query = RankingQuery(sort="q_sat_mol_per_kg", descending=descending, offset=offset, limit=limit)
        for subset, ranked in ((None, table), (rows, table), (None, demoted), (rows, demoted)):
            page, total = _page_of(ranked, subset, query)
            whole = ranked if subset is None else ranked.take(pa.array(subset))
            expected = _sorted_for_page(whole, query).slice(offset, limit)
            assert total == whole.num_rows
            # repr: NaN rows compare equal as text, not as floats
            assert repr(page.to_pylist()) == repr(expected.to_pylist()), (offset, limit, subset is None)


# -- the default ranking: reliability and conditions (docs/results.md, "Default ranking")

def _manifest(store, batch_id, p_ads, p_des):
    store.write_manifest({"batch_id": batch_id, "conditions": {
        "adsorption_pressure_pa": p_ads, "desorption_pressure_pa": p_des,
        "reference_pressures_pa": [], "adsorption_temperature_k": None,
        "desorption_temperature_k": None}})


def _row(iso, sorbent, loading, q_sat, stderr, flags=(), temperature_k=298.15):
    return {"isotherm_id": iso, "sorbent_id": sorbent, "adsorbate": "CO2",
            "temperature_k": temperature_k, "loading_ads_mol_per_kg": loading,
            "loading_des_mol_per_kg": loading / 2,
            "working_capacity_mol_per_kg": loading / 2, "q_sat_mol_per_kg": q_sat,
            "q_sat_stderr_mol_per_kg": stderr, "quality_flags": list(flags)}


def test_extrapolated_rows_sort_last_by_default_and_in_place_only_when_asked(tmp_path):
    """Truth set of our own: the largest figures are the extrapolated ones
    (a 730 mol/kg capacity flagged capacity_extrapolated, a 489.9 mol/kg one
    with a 60 % standard error, a loading at a pressure beyond the data)."""
    from sorbrank.worker.store import ranking

    store = Store(tmp_path)
    batch_id = new_batch_id(T0)
    _manifest(store, batch_id, 1e5, 1e4)
    write_summaries(store, batch_id, T0, [
        _row("i1", "far", 9.0, 730.0, 20.0, ["capacity_extrapolated"]),
        _row("i2", "loose", 8.0, 489.9, 294.0),
        _row("i3", "beyond", 12.0, 5.0, 0.2, ["extrapolated_adsorption_pressure"]),
        _row("i4", "good", 3.0, 4.0, 0.1),
        _row("i5", "fair", 2.0, 6.0, 1.4),   # 23 % relative standard error: inside the bound
    ])

    def order(**kw):
        return ranking(store, RankingQuery(**kw)).page["sorbent_id"].to_pylist()

    # the default sort is the loading at the adsorption pressure
    assert RankingQuery().sort == "loading_ads_mol_per_kg"
    assert order() == ["far", "loose", "good", "fair", "beyond"]
    assert order(unreliable_last=False) == ["beyond", "far", "loose", "good", "fair"]
    assert order(sort="q_sat_mol_per_kg") == ["fair", "beyond", "good", "far", "loose"]
    assert order(sort="q_sat_mol_per_kg", unreliable_last=False)[:2] == ["far", "loose"]
    # ascending keeps the unreliable rows last too
    assert order(sort="q_sat_mol_per_kg", descending=False) == [
        "good", "beyond", "fair", "loose", "far"]
    page = ranking(store, RankingQuery(sort="q_sat_mol_per_kg")).page
    assert page["q_sat_reliable"].to_pylist() == [True, True, True, False, False]
    assert page["loading_ads_reliable"].to_pylist() == [True, False, True, True, True]
    # a page inside the reliable rows, and one that reaches the demoted tail
    assert order(sort="q_sat_mol_per_kg", limit=2) == ["fair", "beyond"]
    assert order(sort="q_sat_mol_per_kg", limit=2, offset=3) == ["far", "loose"]


def test_old_rows_get_the_default_sort_reliability_and_condition_columns_on_read(tmp_path):
    """Rows as an older sorbrank stored them (no reliability or condition
    columns): the ranking reads them with both, conditions from the manifest."""
    from sorbrank.worker.store import CONDITION_COLUMNS, ranking

    store = Store(tmp_path)
    batch_id = new_batch_id(T0)
    _manifest(store, batch_id, 2e5, 5e3)
    old = [_row("i1", "A", 2.0, 3.0, 0.1), _row("i2", "B", 1.0, 900.0, 10.0,
                                                 ["capacity_extrapolated"], temperature_k=273.15)]
    write_summaries(store, batch_id, T0, old)
    assert "q_sat_reliable" not in store.dataset("summaries").schema.names
    result = ranking(store, RankingQuery())
    rows = result.page.to_pylist()
    assert [r["sorbent_id"] for r in rows] == ["A", "B"]
    for name in CONDITION_COLUMNS + ("q_sat_reliable", "loading_ads_reliable",
                                     "working_capacity_reliable"):
        assert name in result.page.column_names
    assert [(r["adsorption_pressure_pa"], r["desorption_pressure_pa"]) for r in rows] == [
        (2e5, 5e3), (2e5, 5e3)]
    assert [r["adsorption_temperature_k"] for r in rows] == [298.15, 273.15]
    assert [r["q_sat_reliable"] for r in rows] == [True, False]
    # a store without manifests (or a batch whose manifest is unreadable): conditions unknown
    bare = Store(tmp_path / "bare")
    write_summaries(bare, new_batch_id(T0), T0, old)
    page = ranking(bare, RankingQuery()).page
    assert page["adsorption_pressure_pa"].to_pylist() == [None, None]


def test_mixed_condition_rankings_are_marked_and_one_condition_set_is_not(tmp_path):
    from sorbrank.worker.store import ranking

    store = Store(tmp_path)
    first, second = new_batch_id(T0), new_batch_id(T0 + timedelta(minutes=1))
    _manifest(store, first, 1e5, 1e4)
    _manifest(store, second, 5e5, 1e4)
    write_summaries(store, first, T0, [_row("i1", "A", 2.0, 3.0, 0.1),
                                       _row("i2", "B", 1.5, 3.0, 0.1, temperature_k=298.4)])
    write_summaries(store, second, T0 + timedelta(minutes=1), [_row("i3", "C", 4.0, 5.0, 0.1)])

    mixed = ranking(store, RankingQuery())
    assert mixed.mixed_conditions
    assert mixed.condition_sets == [
        # one temperature over the ranking (298.15, 298.4, 298.15 K: their mean), two pressures
        {"adsorption_pressure_pa": 1e5, "adsorption_temperature_k": 298.23, "rows": 2},
        {"adsorption_pressure_pa": 5e5, "adsorption_temperature_k": 298.23, "rows": 1}]
    # one batch: one pressure; 298.15 and 298.4 K are one temperature (within 0.5 K)
    one = ranking(store, RankingQuery(batch_id=first))
    assert not one.mixed_conditions and one.condition_sets[0]["rows"] == 2
    # the desorption pressure is shared: a ranking by the desorption loading is not mixed
    assert not ranking(store, RankingQuery(sort="loading_des_mol_per_kg")).mixed_conditions
    # working capacity depends on both pressures
    assert ranking(store, RankingQuery(sort="working_capacity_mol_per_kg")).mixed_conditions
    # a figure with no process conditions reports none
    assert ranking(store, RankingQuery(sort="q_sat_mol_per_kg")).condition_sets == []
    # temperatures more than the tolerance apart are different conditions
    write_summaries(store, first, T0, [_row("i4", "D", 2.5, 3.0, 0.1, temperature_k=273.15)],
                    chunk=1)
    by_temperature = ranking(store, RankingQuery(batch_id=first))
    assert [s["adsorption_temperature_k"] for s in by_temperature.condition_sets] == pytest.approx(
        [298.275, 273.15], abs=0.006)
