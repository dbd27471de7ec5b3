"""Reads at many batches: a sorbent's record, a plot, the overview and
/metrics through the real app, with the read index and with the reads as
they were before it, side by side in one run.

1. Build (cached under --dir; default a directory in the system temp dir
   named after the size) a store of --batches finished batches, written
   through the real Store API (``Store.write_table``, ``write_manifest``,
   ``write_chunk_status``, ``write_final``) and sealed in the read index as
   ``worker/jobs.py`` seals a finished batch (``index.seal_batch``, then
   ``index.consolidate`` as completions call it). The rows are those of one
   real batch fitted once through the jobs (three CO2 isotherms of two
   sorbents at 273.15 and 298.15 K, every model), re-keyed per batch:
   sorbents come from a pool of --batches / 5 "MOF-nnnnnn" and "ZIF-nnnnnn"
   ids, so a sorbent is measured in ~5 batches (latest wins has work).
   One chunk per batch, four data files, three JSON records. While building,
   fsync is skipped (the files are the same; a durable write per file would
   make the build take hours, not the reads any slower). Prints the build
   time and the disk used.
2. Time, through ``create_app(...).test_client()`` on that store, each
   request once cold (the app's first) and then --repeats times (median),
   with the index and with SORBRANK_READ_INDEX=0 (the reads kept callable
   as they were: whole-table scans, a recursive listing per table, one
   manifest check per batch), interleaved, and print the ratios. The two
   answers are compared (same body, or same HTML without timings).
   Requests: GET /api/v1/sorbents/<id>, GET /sorbents/<id> (the page),
   GET /api/v1/isotherms/<id>/plot, GET / (the overview), GET /metrics.
3. --compaction: what merging the small chunk files would save: reading the
   summaries' ranking columns from the per-batch files (what the first
   ranking of a process does) against from the same rows in one file.
4. --rankings: the overview and GET /api/v1/rankings with compacted
   summaries (worker/store/compaction.py; the store is compacted first,
   timed, when it has no compacted files), with the index alone (compacted
   files moved aside) and without the index, each in a fresh process of its
   own (cold, then --repeats warm, median; its peak RSS), answers compared.
   With --skip overview, the main loop leaves the overview to this section;
   --skip index-rankings leaves out both baselines, --skip old-rankings the
   one without the index (each needs memory growing with the batches).

Targets (issue 19): sorbent record <= 0.5 s, plot <= 0.5 s, overview <= 1 s,
/metrics <= 0.5 s at 100,000 batches. Nothing here asserts a time.

    .venv/bin/python benchmarks/bench_reads.py --batches 100000 --repeats 5
    .venv/bin/python benchmarks/bench_reads.py --batches 2000 --old-repeats 3
"""
from __future__ import annotations

import argparse
import os
import re
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from contextlib import contextmanager
from datetime import datetime, timedelta, timezone
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import pyarrow as pa  # noqa: E402
import pyarrow.dataset as ds  # noqa: E402
import pyarrow.parquet as pq  # noqa: E402

T0 = datetime(2026, 1, 1, tzinfo=timezone.utc)
PRESSURES_KPA = (1, 2, 5, 10, 20, 40, 60, 80, 100)
TEMPLATE = (("S1", 3.0, 0.08, 273.15), ("S1", 2.6, 0.05, 298.15), ("S2", 1.8, 0.02, 298.15))


def template_batch(tmp: Path) -> dict:
    """One real batch, fitted through the jobs: its tables, statuses and records."""
    from sorbrank.worker import jobs
    from sorbrank.worker.intake import read_batch
    from sorbrank.worker.store import Store

    lines = ["sorbent_id,adsorbate,temperature_k,pressure_kpa,loading_mol_per_kg"]
    for sorbent, q_sat, b_per_kpa, temperature_k in TEMPLATE:
        for p in PRESSURES_KPA:
            lines.append(f"{sorbent},CO2,{temperature_k},{p},"
                         f"{q_sat * b_per_kpa * p / (1 + b_per_kpa * p):.6f}")
    store = Store(tmp)
    manifest = jobs.accept_batch(store, read_batch(("\n".join(lines) + "\n").encode(), "csv",
                                                   batch_label="bench"),
                                 options={}, chunk_size=2000)
    batch_id = manifest["batch_id"]
    jobs.execute_chunk(store, batch_id, 0)
    tables = {t: store.read_chunk(t, batch_id, 0) for t in ("inputs", "fits", "summaries")}
    if store.has_chunk("sorbents", batch_id, 0):
        tables["sorbents"] = store.read_chunk("sorbents", batch_id, 0)
    return {"manifest": manifest, "tables": tables,
            "status": store.read_chunk_statuses(batch_id)[0], "final": store.read_final(batch_id)}


def rekeyed(table: pa.Table, names: dict[str, str], accepted_at: datetime) -> pa.Table:
    """The template's rows with its sorbent (and isotherm) ids replaced."""
    for column in ("sorbent_id", "isotherm_id"):
        if column in table.column_names:
            values = table[column].to_pylist()
            for old, new in names.items():
                values = [None if v is None else v.replace(old + "|", new + "|", 1)
                          if column == "isotherm_id" else names.get(v, v) for v in values]
            table = table.set_column(table.column_names.index(column), column,
                                     pa.array(values, pa.string()))
    if "accepted_at" in table.column_names:
        moment = pa.array([accepted_at] * table.num_rows, table.schema.field("accepted_at").type)
        table = table.set_column(table.column_names.index("accepted_at"), "accepted_at", moment)
    return table


@contextmanager
def no_fsync():
    """Durable writes are not what is measured: skip fsync while building."""
    real = os.fsync
    os.fsync = lambda fd: None
    try:
        yield
    finally:
        os.fsync = real


def batch_names(k: int) -> tuple[str, dict[str, str], datetime]:
    """Batch k's id, sorbent ids and acceptance time; the same whatever the
    store's size, so a store can be extended. MOF-j is measured in batches
    5j..5j+4, ZIF ids come back every 10,007 batches."""
    moment = T0 + timedelta(seconds=30 * k)
    return (f"b-{moment:%Y%m%d-%H%M%S-%f}-{k:08x}",
            {"S1": f"MOF-{k // 5:06d}", "S2": f"ZIF-{(k * 7 + 3) % 10007:06d}"}, moment)


def write_batches(root: Path, template: dict, ks: range) -> None:
    """Batches ``ks`` as the jobs leave a finished batch: its files, records and seal."""
    from sorbrank.worker.store import Store
    from sorbrank.worker.store import index as read_index
    from sorbrank.worker.store.layout import iso_utc

    store = Store(root)
    with no_fsync():
        for k in ks:
            batch_id, names, moment = batch_names(k)
            manifest = dict(template["manifest"], batch_id=batch_id, accepted_at=iso_utc(moment))
            manifest["chunks"] = [dict(c, sorbents=sorted(names[s] for s in c["sorbents"]))
                                  for c in manifest["chunks"]]
            known = {}
            for table in ("inputs", "fits", "sorbents", "summaries"):
                if table in template["tables"]:
                    data = rekeyed(template["tables"][table], names, moment)
                    path = str(store.write_table(table, batch_id, 0, data))
                    info = store.fs.get_file_info(path)
                    # the key rows the jobs' entries would hold: no need to read the file back
                    known[path] = (info.size, info.mtime_ns, read_index.key_rows(
                        table, batch_id, 0, data, info.size, info.mtime_ns), data.schema)
            store.write_manifest(manifest)
            store.write_chunk_status(batch_id, 0, template["status"])
            store.write_final(batch_id, template["final"])
            read_index.seal_batch(store, batch_id, known)
            read_index.consolidate(store)


def _write_batches_job(args) -> None:
    write_batches(*args)


def build(root: Path, batches: int, jobs: int) -> None:
    """Extend the store under ``root`` to ``batches`` batches (kept between runs)."""
    import multiprocessing

    from sorbrank.worker.store import index as read_index

    marker = root / ".bench-batches"
    have = int(marker.read_text()) if marker.exists() else 0
    if have >= batches:
        print(f"store    : {root} (cached, {have:,} batches; the first {batches:,} are not "
              "told apart: using all)" if have > batches else f"store    : {root} (cached)")
        return
    if have == 0:
        shutil.rmtree(root, ignore_errors=True)
    started = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        template = template_batch(Path(tmp))
    for data in template["tables"].values():
        assert "batch_id" not in data.column_names
    step = 5000
    pool = multiprocessing.get_context("spawn").Pool(jobs) if jobs > 1 else None
    try:
        for first in range(have, batches, step):
            last = min(first + step, batches)
            shares = [range(first + j, last, jobs) for j in range(jobs)]
            if pool is not None:
                pool.map(_write_batches_job, [(root, template, r) for r in shares])
            else:
                write_batches(root, template, shares[0])
            marker.write_text(str(last))
            rate = (last - have) / (time.perf_counter() - started)
            print(f"  built {last:,} batches ({rate:,.0f}/s)", flush=True)
    finally:
        if pool is not None:
            pool.close()
            pool.join()
    read_index.consolidate(Store_(root), min_seals=1)
    elapsed = time.perf_counter() - started
    print(f"build    : {batches - have:,} batches in {elapsed:,.1f} s "
          f"({(batches - have) / elapsed:,.1f}/s, {jobs} process(es), fsync skipped)")


def Store_(root: Path):
    from sorbrank.worker.store import Store
    return Store(root)


def disk(root: Path) -> str:
    def du(path: Path) -> int:
        out = subprocess.run(["du", "-sb", str(path)], capture_output=True, text=True)
        return int(out.stdout.split()[0]) if out.returncode == 0 and out.stdout else 0
    files = sum(1 for _ in root.rglob("*.parquet"))
    return (f"{du(root) / 1e6:,.0f} MB in all, index {du(root / 'index') / 1e6:,.1f} MB; "
            f"{files:,} Parquet files")


def app_for(root: Path):
    from sorbrank.service.app import create_app
    from sorbrank.service.config import load_settings

    settings = load_settings({"SORBRANK_DATA_DIR": str(root)})
    return create_app(settings, enqueue=lambda batch_id, chunk: None, queue_depth=lambda: 0)


@contextmanager
def index_setting(on: bool):
    held = os.environ.get("SORBRANK_READ_INDEX")
    os.environ["SORBRANK_READ_INDEX"] = "1" if on else "0"
    try:
        yield
    finally:
        if held is None:
            os.environ.pop("SORBRANK_READ_INDEX", None)
        else:
            os.environ["SORBRANK_READ_INDEX"] = held


_VOLATILE = re.compile(rb"(\d+(\.\d+)?e[-+]\d+|[0-9]{4}-[0-9]{2}-[0-9]{2}T[^\"<]*)")


def timed_get(client, url: str, on: bool) -> tuple[float, int, bytes]:
    with index_setting(on):
        started = time.perf_counter()
        response = client.get(url)
        elapsed = time.perf_counter() - started
    return elapsed, response.status_code, response.get_data()


def comparable(url: str, body: bytes) -> bytes:
    if url == "/metrics":  # the scrape's own process figures differ between runs
        return b"\n".join(line for line in body.splitlines()
                          if line.startswith(b"sorbrank_"))
    return body


def compaction_probe(root: Path) -> None:
    """Ranking columns of every summaries row: from the per-batch files
    (what a process's first ranking reads) against one merged file."""
    columns = ["sorbent_id", "adsorbate", "temperature_k", "accepted_at",
               "loading_ads_mol_per_kg"]
    started = time.perf_counter()
    dataset = ds.dataset(str(root / "summaries"), format="parquet", partitioning="hive")
    names = [c for c in columns if c in dataset.schema.names]
    spread = dataset.to_table(columns=names)
    t_spread = time.perf_counter() - started
    merged_path = root.parent / (root.name + "-merged-summaries.parquet")
    pq.write_table(spread, merged_path)
    started = time.perf_counter()
    merged = pq.read_table(merged_path, columns=names)
    t_merged = time.perf_counter() - started
    merged_path.unlink()
    assert merged.num_rows == spread.num_rows
    print(f"compact  : ranking columns of {spread.num_rows:,} summaries rows: "
          f"{len(dataset.files):,} files {t_spread:.2f} s, one merged file {t_merged:.3f} s "
          f"({t_spread / max(t_merged, 1e-9):,.0f}x); a warm ranking reads neither "
          f"(its columns are kept in memory)")


RANKING_URLS = (("overview", "/", 1.0), ("rankings", "/api/v1/rankings", 1.0))


def peak_rss_mb() -> float:
    """This process's peak RSS: VmHWM (ru_maxrss on Linux keeps the high-water
    mark of the process that exec'd it, here the benchmark's own)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _ranking_probe(root: Path, mode: str, repeats: int) -> None:
    """In its own process (its peak memory is its own): the overview and
    GET /api/v1/rankings on a fresh app, cold then warm; one JSON line."""
    import hashlib
    import json

    out: dict = {"mode": mode}
    with index_setting(mode != "old"):
        client = app_for(root).test_client()
        for name, url, _ in RANKING_URLS:
            cold, status, body = timed_get(client, url, mode != "old")
            assert status == 200, (url, status, body[:300])
            warm = [timed_get(client, url, mode != "old")[0] for _ in range(max(repeats, 1))]
            out[name] = {"cold": cold, "warm": statistics.median(warm),
                         "body": hashlib.sha256(_VOLATILE.sub(b"", body)).hexdigest()}
    out["rss_mb"] = peak_rss_mb()
    print(json.dumps(out), flush=True)


def rankings_side_by_side(root: Path, repeats: int, old: bool, baselines: bool = True) -> bool:
    """The overview and /api/v1/rankings, each way in a process of its own:
    with the read index and compacted summaries, with the index alone (the
    compacted files moved aside; with ``baselines``) and without the index
    (``old`` too). Compacts the store first when it has no compacted files
    (timed)."""
    import json

    from sorbrank.worker.store import Store, compaction

    folder = Path(compaction.folder(Store(root)))
    aside = folder.with_name(folder.name + ".aside")
    if aside.exists() and not folder.exists():
        aside.rename(folder)
    if not folder.exists() or not any(folder.iterdir()):
        with index_setting(True):
            started = time.perf_counter()
            done = compaction.compact(Store(root), min_batches=1)
            elapsed = time.perf_counter() - started
        size_mb = sum(p.stat().st_size for p in folder.iterdir()) / 1e6
        print(f"compact  : the summaries of {done:,} batches into "
              f"{len(list(folder.iterdir()))} file(s), {size_mb:,.1f} MB, in {elapsed:.1f} s "
              f"(one process, from nothing; a worker compacts {compaction.COMPACT_BATCHES} "
              f"new batches at a time)", flush=True)

    def probe(mode: str) -> dict:
        proc = subprocess.run([sys.executable, __file__, "--dir", str(root), "--batches", "0",
                               "--repeats", str(repeats), "--ranking-probe", mode],
                              capture_output=True, text=True)
        if proc.returncode != 0:
            return {"mode": mode, "error": proc.stderr.strip().splitlines()[-1:]}
        return json.loads(proc.stdout.strip().splitlines()[-1])

    results = {"compacted": probe("compacted")}
    if baselines:
        folder.rename(aside)
        try:
            results["index"] = probe("index")
            if old:
                results["old"] = probe("old")
        finally:
            aside.rename(folder)
    ok = True
    for name, _, target in RANKING_URLS:
        line = f"{name:<15}:"
        base = results["compacted"].get(name)
        for mode, found in results.items():
            got = found.get(name)
            if got is None:
                line += f" {mode}: {found.get('error')} |"
                continue
            line += (f" {mode} cold {got['cold'] * 1000:,.0f} ms, warm {got['warm'] * 1000:,.1f} ms"
                     f" ({found['rss_mb']:,.0f} MB peak) |")
        if base is not None:
            line += f" target {target * 1000:.0f} ms warm: {'met' if base['warm'] <= target else 'MISSED'}"
            for mode in ("index", "old"):
                other = results.get(mode, {}).get(name)
                if other is not None:
                    same = other["body"] == base["body"]
                    ok &= same
                    line += (f"; {mode}/compacted cold {other['cold'] / base['cold']:,.1f}x, "
                             f"same answer: {'yes' if same else 'NO'}")
        print(line, flush=True)
    return ok


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--batches", type=int, default=100_000)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--old-repeats", type=int, default=2,
                        help="warm repeats of the reads without the index (slow at scale)")
    parser.add_argument("--no-old", action="store_true", help="skip the reads without the index")
    parser.add_argument("--compaction", action="store_true")
    parser.add_argument("--build-jobs", type=int, default=2)
    parser.add_argument("--build-only", action="store_true")
    parser.add_argument("--no-disk", action="store_true", help="skip measuring the disk used")
    parser.add_argument("--skip", action="append", default=[], metavar="REQUEST",
                        help="leave out a request by name, e.g. --skip overview (its first "
                             "ranking needs memory that grows with the summaries files)")
    parser.add_argument("--rankings", action="store_true",
                        help="also the overview and /api/v1/rankings with compacted summaries "
                             "(compacting the store first), with the index alone and without it, "
                             "each in a process of its own")
    parser.add_argument("--ranking-probe", choices=("compacted", "index", "old"),
                        help=argparse.SUPPRESS)
    parser.add_argument("--dir", type=Path, default=None,
                        help="the store (extended to --batches when it holds fewer)")
    args = parser.parse_args(argv)
    root = args.dir or Path(tempfile.gettempdir()) / "sorbrank-bench-reads"
    if args.ranking_probe:
        _ranking_probe(root, args.ranking_probe, args.repeats)
        return 0

    print(f"machine  : {os.cpu_count()} cores; {cpu_flags()}")
    build(root, args.batches, args.build_jobs)
    if not args.no_disk:
        print(f"disk     : {disk(root)}")
    if args.build_only:
        return 0

    from sorbrank.worker.store import Store
    store = Store(root)
    newest = int((root / ".bench-batches").read_text()) - 1
    sorbent = batch_names(newest - 4)[1]["S1"]   # measured in five batches, the newest among them
    isotherm_id = store.read_chunk("inputs", store.batch_ids()[0], 0)["isotherm_id"][0].as_py()
    requests = [("sorbent record", f"/api/v1/sorbents/{sorbent}", 0.5),
                ("sorbent page", f"/sorbents/{sorbent}", None),
                ("plot", f"/api/v1/isotherms/{isotherm_id}/plot", 0.5),
                ("metrics", "/metrics", 0.5),
                ("overview", "/", 1.0)]   # last: its first ranking reads every summaries file
    warm_up_imports([url for _, url, _ in requests])
    apps = {True: app_for(root).test_client()}
    if not args.no_old:
        apps[False] = app_for(root).test_client()

    requests = [r for r in requests if r[0] not in args.skip]
    ok = True
    for name, url, target in requests:
        results = {}
        for on, client in apps.items():
            cold, status, body = timed_get(client, url, on)
            assert status == 200, (url, status, body[:300])
            repeats = args.repeats if on else args.old_repeats
            warm = [timed_get(client, url, on)[0] for _ in range(max(repeats, 1))]
            results[on] = (cold, statistics.median(warm), body)
        new_cold, new_warm, new_body = results[True]
        line = (f"{name:<15}: index cold {new_cold * 1000:9.1f} ms, warm median "
                f"{new_warm * 1000:8.1f} ms")
        if target is not None:
            line += f" (target {target * 1000:.0f} ms: {'met' if new_warm <= target else 'MISSED'})"
        if False in results:
            old_cold, old_warm, old_body = results[False]
            same = comparable(url, new_body) == comparable(url, old_body)
            ok &= same
            line += (f" | no index cold {old_cold * 1000:9.1f} ms, warm {old_warm * 1000:9.1f} ms"
                     f" | ratio warm {old_warm / new_warm:7.1f}x, cold {old_cold / new_cold:6.1f}x"
                     f" | same answer: {'yes' if same else 'NO'}")
        print(line, flush=True)

    # a plot is mostly drawing: its read alone (what the index changes)
    from sorbrank.worker.store import readmodel
    for label, read in (("plot's read    :", lambda st: readmodel.load_isotherm(st, isotherm_id)),
                        ("record's read  :", lambda st: readmodel.sorbent_tables(st, sorbent))):
        line = label
        for on, client in apps.items():
            store_of_app = client.application.extensions["sorbrank"].store
            with index_setting(on):
                times = []
                for _ in range(max(args.repeats if on else args.old_repeats, 1)):
                    started = time.perf_counter()
                    read(store_of_app)
                    times.append(time.perf_counter() - started)
            line += (f" {'index' if on else 'no index'} median "
                     f"{statistics.median(times) * 1000:.1f} ms;")
        print(line.rstrip(";") + " (the rest of a request is drawing or JSON)", flush=True)
    # a batch landing is seen by the next read (its seal is a new index file)
    index_new_batch(root, apps[True], sorbent)
    if args.compaction:
        compaction_probe(root)
    if args.rankings:
        ok &= rankings_side_by_side(root, args.repeats, "old-rankings" not in args.skip,
                                    "index-rankings" not in args.skip)
    rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"memory   : peak RSS {rss_mb:,.0f} MB ({len(apps)} app(s) in one process)")
    print(f"result   : {'OK' if ok else 'MISMATCH'}")
    return 0 if ok else 1


def warm_up_imports(urls: list[str]) -> None:
    """Every request once on a one-batch store, both ways: first imports
    (matplotlib, compute kernels) are paid here, not by whichever app is timed first."""
    with tempfile.TemporaryDirectory() as tmp:
        template_batch(Path(tmp))
        client = app_for(Path(tmp)).test_client()
        for url in ("/", "/metrics", "/api/v1/sorbents/S1", "/sorbents/S1"):
            for on in (True, False):
                timed_get(client, url, on)
        from sorbrank.worker.store import Store
        iso = Store(tmp).query("inputs")["isotherm_id"][0].as_py()
        timed_get(client, f"/api/v1/isotherms/{iso}/plot", True)


def index_new_batch(root: Path, client, sorbent: str) -> None:
    """One more finished batch of the timed sorbent; the next record shows it."""
    from sorbrank.worker.store import Store
    from sorbrank.worker.store import index as read_index

    store = Store(root)
    newest = store.batch_ids()[0]
    moment = T0 + timedelta(days=36500)
    batch_id = f"b-{moment:%Y%m%d-%H%M%S-%f}-ffffffff"
    try:
        for table in ("inputs", "fits", "summaries"):
            store.write_table(table, batch_id, 0, store.read_chunk(table, newest, 0))
        store.write_manifest(dict(store.read_manifest(newest), batch_id=batch_id))
        store.write_chunk_status(batch_id, 0, store.read_chunk_statuses(newest)[0])
        store.write_final(batch_id, store.read_final(newest))
        read_index.seal_batch(store, batch_id)
        elapsed, status, body = timed_get(client, f"/api/v1/sorbents/{sorbent}", True)
        seen = batch_id.encode() in body
        print(f"fresh    : a new sealed batch is in the next sorbent record: "
              f"{'yes' if seen else 'NO'} ({elapsed * 1000:.1f} ms, first read after it)")
    finally:
        for table in ("inputs", "fits", "summaries", "sorbents"):
            shutil.rmtree(root / table / f"batch_id={batch_id}", ignore_errors=True)
        shutil.rmtree(root / "batches" / batch_id, ignore_errors=True)
        for path in (root / "index" / "loose").glob(f"{batch_id}.*"):
            path.unlink()


def cpu_flags() -> str:
    try:
        text = Path("/proc/cpuinfo").read_text()
    except OSError:
        return "cpu flags unknown"
    model = next((line.split(":", 1)[1].strip() for line in text.splitlines()
                  if line.startswith("model name")), "?")
    flags = set(next((line.split(":", 1)[1].split() for line in text.splitlines()
                      if line.startswith("flags")), []))
    vector = [f for f in ("avx2", "avx512f") if f in flags]
    return f"{model}; {', '.join(vector) or 'no AVX2/AVX-512'}"


if __name__ == "__main__":
    sys.exit(main())
