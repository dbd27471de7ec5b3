"""Rankings over a large store: sorbrank.worker.store.rankings and GET /api/v1/rankings.

1. Build (once; cached under --dir, default a directory in the system temp
   dir named after the size) a store whose ``summaries`` table holds --rows
   summary rows with the real summary schema: the schema is taken from a real
   ``BatchResult.summary_table()`` of a few fitted isotherms, the columns are
   generated with numpy and written through ``Store.write_table`` (the code
   the workers use), spread over --batches batches x --chunks chunks.
   Sorbents repeat across batches (a pool of rows/20 sorbents, each
   measured for CO2 / N2 / CH4 / H2 at 273.15 / 298.15 / 313.15 K with small
   temperature jitter), so latest-wins has real work; 10 % desorption rows;
   flags drawn from a few realistic combinations. Chunks keep each sorbent's
   rows together, as jobs do.
2. Time the queries below, each --repeats times after one warm-up, with the
   current code and with the baseline (the store of the last commit,
   ``worker/store.py`` or the ``worker/store/`` package, loaded as a separate module), side by
   side on the same store, interleaved. Prints medians and the ratio, and
   checks that both return the same page and total (exit status 1 if not).
3. The same main query through the HTTP endpoint (Flask test client of
   ``sorbrank.service.app.create_app`` on the store; JSON body), median over --repeats.
4. --fresh-file: after the timings, add one batch and check the next query
   sees it (the listing cache must notice new chunk files).

Queries (latest-wins unless said):
  main   adsorbate=CO2, temperature 298.15 +- 0.5 K, sort
         working_capacity_mol_per_kg desc, limit 100, exclude_flag=ambiguous
  flag   the same with flag=at_bound (keep rows carrying it)
  all    the main filter with all=true (no latest-wins)
  wide   no filter at all, sort q_sat_mol_per_kg desc, limit 100

Target the project reports against: the main query well under 1 s at
1,000,000 rows. Nothing here asserts a time.

    .venv/bin/python benchmarks/bench_rankings.py                # 1,000,000 rows
    .venv/bin/python benchmarks/bench_rankings.py --rows 20000 --repeats 3
"""
from __future__ import annotations

import argparse
import importlib.util
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import pyarrow as pa  # noqa: E402

ADSORBATES = ("CO2", "N2", "CH4", "H2")
TEMPERATURES = (273.15, 298.15, 313.15)
FLAG_SETS = ((), (), (), ("ambiguous",), ("at_bound",), ("ambiguous", "at_bound"),
             ("q_sat_from_other_model",), ("at_bound", "non_monotonic_loading"))
T0 = datetime(2024, 1, 1, tzinfo=timezone.utc)
LAYOUT_VERSION = "2"  # bump when the generated data changes: cached stores are rebuilt


# --------------------------------------------------------------------------
# the store

def real_summary_schema() -> pa.Schema:
    """The schema of a real summary table (a few isotherms fitted for real)."""
    from sorbrank.worker.intake import read_batch
    from sorbrank.worker.pipeline import FitOptions, process_batch

    pressures = (1, 2, 5, 10, 20, 40, 60, 80, 100)
    lines = ["sorbent_id,adsorbate,temperature_k,pressure_kpa,loading_mol_per_kg"]
    for k, t in enumerate((273.15, 298.15)):
        for p in pressures:
            lines.append(f"S{k},CO2,{t},{p},{(2 + k) * 0.1 * p / (1 + 0.1 * p):.6f}")
    batch = read_batch("\n".join(lines) + "\n", "csv", batch_label="schema")
    table = process_batch(batch, FitOptions(models=["langmuir", "sips"])).summary_table()
    return table.schema.append(pa.field("accepted_at", pa.timestamp("us", tz="UTC")))


def _strings(values) -> pa.Array:
    return pa.array(np.asarray(values, dtype=object), pa.string())


def chunk_table(schema: pa.Schema, rng, n: int, sorbents: np.ndarray, accepted_at: datetime,
                batch_no: int, chunk_no: int) -> pa.Table:
    """``n`` summary rows for the sorbents given (all their rows in this chunk)."""
    per = -(-n // len(sorbents))
    mat = np.repeat(sorbents, per)[:n]
    ads = np.array(ADSORBATES)[rng.integers(0, len(ADSORBATES), n)]
    temp = np.array(TEMPERATURES)[rng.integers(0, len(TEMPERATURES), n)]
    temp = temp + rng.choice([0.0, 0.0, 0.05, -0.1, 0.3], n)
    branch = np.where(rng.random(n) < 0.1, "desorption", "adsorption")
    mat_ids = np.array([f"MOF-{m:06d}" for m in mat], dtype=object)
    iso_ids = np.array([f"{m}|{a}|{t:.2f}K|{b}|{batch_no:04d}{chunk_no:02d}{i:05d}"
                        for i, (m, a, t, b) in enumerate(zip(mat_ids, ads, temp, branch))],
                       dtype=object)
    flag_pick = rng.integers(0, len(FLAG_SETS), n)
    flag_lengths = np.array([len(FLAG_SETS[k]) for k in flag_pick])
    flag_values = [f for k in flag_pick for f in FLAG_SETS[k]]
    flags = pa.ListArray.from_arrays(
        pa.array(np.concatenate([[0], np.cumsum(flag_lengths)]).astype(np.int32)),
        _strings(flag_values))
    models = np.array(["langmuir", "sips", "toth", "dual_site_langmuir", "freundlich"], dtype=object)
    columns = {}
    for field in schema:
        name, kind = field.name, field.type
        if name == "isotherm_id":
            columns[name] = _strings(iso_ids)
        elif name == "sorbent_id":
            columns[name] = _strings(mat_ids)
        elif name == "adsorbate":
            columns[name] = _strings(ads)
        elif name == "branch":
            columns[name] = _strings(branch)
        elif name == "temperature_k":
            columns[name] = pa.array(temp, pa.float64())
        elif name == "quality_flags":
            columns[name] = flags
        elif name == "accepted_at":
            columns[name] = pa.array([accepted_at] * n, kind)
        elif name == "ambiguous":
            columns[name] = pa.array(rng.random(n) < 0.2)
        elif name == "criterion":
            columns[name] = _strings(["aicc"] * n)
        elif name in ("best_model", "runner_up", "q_sat_model"):
            columns[name] = _strings(models[rng.integers(0, len(models), n)])
        elif pa.types.is_string(kind):
            columns[name] = _strings(np.where(rng.random(n) < 0.5, "model", "q_sat"))
        elif pa.types.is_integer(kind):
            columns[name] = pa.array(rng.integers(9, 40, n), kind)
        elif pa.types.is_floating(kind):
            values = rng.gamma(2.0, 2.0, n)
            missing = rng.random(n) < 0.05  # some metrics are undefined (null)
            columns[name] = pa.array(values, pa.float64(), mask=missing)
        elif pa.types.is_null(kind):
            # all-null in some chunks, typed in others (as real chunks differ)
            columns[name] = (pa.nulls(n, pa.string()) if chunk_no % 2 else pa.nulls(n))
        elif pa.types.is_list(kind):
            low = rng.uniform(0.05, 0.1, n)
            has = rng.random(n) < 0.3
            values = np.stack([low, low + 0.2], axis=1).ravel()
            columns[name] = pa.ListArray.from_arrays(
                pa.array(np.arange(0, 2 * n + 1, 2, dtype=np.int32)), pa.array(values),
                mask=pa.array(~has))
        else:
            columns[name] = pa.nulls(n, kind)
    return pa.table(columns)


def build_store(root: Path, rows: int, batches: int, chunks: int, seed: int = 1) -> dict:
    """Write the store (skipped when a complete one is there); its description."""
    from sorbrank.worker.store import Store, new_batch_id

    done = root / "BUILT"
    expect = f"{LAYOUT_VERSION} {rows} {batches} {chunks} {seed}"
    if done.exists() and done.read_text() == expect:
        return {"built": False}
    if root.exists():
        shutil.rmtree(root)
    store = Store(root)
    schema = real_summary_schema()
    rng = np.random.default_rng(seed)
    n_sorbents = max(rows // 20, 1)
    per_chunk = max(rows // (batches * chunks), 1)
    started = time.perf_counter()
    written = 0
    for b in range(batches):
        accepted = T0 + timedelta(minutes=7 * b)
        batch_id = new_batch_id(accepted)
        for c in range(chunks):
            n = per_chunk if (b, c) != (batches - 1, chunks - 1) else rows - written
            if n <= 0:
                continue
            # ~12 rows per sorbent per chunk, sorbents drawn from the pool
            sorbents = rng.choice(n_sorbents, size=max(n // 12, 1), replace=False)
            table = chunk_table(schema, rng, n, sorbents, accepted, b, c)
            store.write_table("summaries", batch_id, c, table)
            written += n
    done.write_text(expect)
    return {"built": True, "seconds": time.perf_counter() - started}


# --------------------------------------------------------------------------
# the code under test and the baseline

def baseline_module(rev: str):
    """The store of git revision ``rev`` (its worker/store.py if it has one,
    else its worker/store/ package), loaded as its own module (package worker)."""
    git = lambda *a: subprocess.run(["git", *a], cwd=ROOT, check=True, capture_output=True,  # noqa: E731
                                    text=True).stdout
    listed = git("ls-tree", "-r", "--name-only", rev, "worker/store.py", "worker/store/").split()
    folder = Path(tempfile.mkdtemp(prefix="sorbrank-baseline-"))
    name = "sorbrank.worker.store_baseline"
    if "worker/store.py" in listed:
        path = folder / "store_baseline.py"
        path.write_text(git("show", f"{rev}:worker/store.py"))
        spec = importlib.util.spec_from_file_location(name, path)
    else:
        for file in listed:
            if file.endswith(".py"):
                (folder / Path(file).name).write_text(git("show", f"{rev}:{file}"))
        if not (folder / "__init__.py").exists():
            raise SystemExit(f"revision {rev} has neither worker/store.py nor worker/store/")
        spec = importlib.util.spec_from_file_location(name, folder / "__init__.py",
                                                      submodule_search_locations=[str(folder)])
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


def queries(module) -> dict:
    Q = module.RankingQuery
    # a baseline older than the reliability rule ranks every row in place: so does this one
    in_place = {"unreliable_last": False} if "unreliable_last" in Q.__dataclass_fields__ else {}
    main = dict(adsorbate="CO2", temperature_k=298.15, temperature_tolerance_k=0.5,
                sort="working_capacity_mol_per_kg", descending=True, limit=100, **in_place)
    return {
        "main": Q(**main, exclude_flags=("ambiguous",)),
        "flag": Q(**main, flags=("at_bound",)),
        "all": Q(**main, exclude_flags=("ambiguous",), all_results=True),
        "wide": Q(sort="q_sat_mol_per_kg", descending=True, limit=100, **in_place),
    }


def timed(fn, repeats: int) -> tuple[list[float], object]:
    started = time.perf_counter()
    result = fn()  # warm-up (fills caches the code keeps between queries)
    timed.first_s = time.perf_counter() - started
    times = []
    for _ in range(repeats):
        started = time.perf_counter()
        result = fn()
        times.append(time.perf_counter() - started)
    return times, result


def page_key(result) -> tuple:
    page, total = result
    if page.num_rows == 0:
        return (total,)
    return (total, tuple(page["batch_id"].to_pylist()), tuple(page["isotherm_id"].to_pylist()))


def fmt_ms(seconds: float) -> str:
    return f"{seconds * 1000:9.1f} ms"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=1_000_000, help="summary rows (default 1,000,000)")
    ap.add_argument("--batches", type=int, default=200, help="batches (default 200)")
    ap.add_argument("--chunks", type=int, default=5, help="chunks per batch (default 5)")
    ap.add_argument("--repeats", type=int, default=20, help="timed repeats per query (default 20)")
    ap.add_argument("--baseline-repeats", type=int, default=None,
                    help="timed repeats of the baseline (default: --repeats)")
    ap.add_argument("--baseline", default="HEAD",
                    help="git revision whose store (worker/store.py or worker/store/) is the "
                         "baseline (default HEAD); 'none' skips it")
    ap.add_argument("--dir", type=Path, default=None,
                    help="store directory (kept between runs; default under the temp dir)")
    ap.add_argument("--no-http", action="store_true", help="skip the HTTP endpoint timing")
    args = ap.parse_args(argv)

    root = args.dir or Path(tempfile.gettempdir()) / (
        f"sorbrank-bench-rankings-{args.rows}-{args.batches}x{args.chunks}")
    info = build_store(root, args.rows, args.batches, args.chunks)
    from sorbrank.worker import store as current
    from sorbrank.worker.store import Store

    files = list((root / "summaries").rglob("chunk-*.parquet"))
    print(f"store    : {root} ({args.rows:,} summary rows, {args.batches} batches x "
          f"{args.chunks} chunks, {len(files)} files, "
          f"{sum(f.stat().st_size for f in files) / 1e6:.1f} MB)"
          + (f"; built in {info['seconds']:.1f} s" if info["built"] else "; reused"))

    base = None if args.baseline == "none" else baseline_module(args.baseline)
    base_repeats = args.baseline_repeats or args.repeats
    ok = True
    main_median = None
    print(f"queries  : median of {args.repeats} (baseline {base_repeats}) after one warm-up; "
          "same store, same process")
    for name in queries(current):
        store_now = Store(root)  # one Store per code path, reused across queries
        now_times, now_result = timed(lambda: current.rankings(store_now, queries(current)[name]),
                                      args.repeats)
        line = f"  {name:<5}: current {fmt_ms(statistics.median(now_times))}"
        if name == "main":
            main_median = statistics.median(now_times)
            kept = store_now.snapshot("summaries")  # the listing just made, kept
            kept_mb = sum(a.nbytes for a in kept.combined.values()) / 1e6 if kept else 0.0
            print(f"  first query on a fresh Store (reads the key columns of every file): "
                  f"{timed.first_s * 1000:.0f} ms; kept in memory: {kept_mb:.0f} MB")
        if base is not None:
            store_base = base.Store(root)
            base_times, base_result = timed(
                lambda: base.rankings(store_base, queries(base)[name]), base_repeats)
            same = page_key(now_result) == page_key(base_result)
            ok &= same
            line += (f"   baseline {fmt_ms(statistics.median(base_times))}"
                     f"   ratio {statistics.median(base_times) / statistics.median(now_times):6.1f}x"
                     f"   same page: {'yes' if same else 'NO'}")
        line += f"   ({now_result[1]:,} rows before paging)"
        print(line, flush=True)
    print(f"rankings : main query median {main_median * 1000:.1f} ms over {args.rows:,} rows "
          "(target: well under 1000 ms)")

    if not args.no_http:
        client = _app_for(root).test_client()
        url = ("/api/v1/rankings?adsorbate=CO2&temperature_k=298.15&temperature_tolerance_k=0.5"
               "&sort=working_capacity_mol_per_kg&order=desc&limit=100&exclude_flag=ambiguous")

        def get():
            response = client.get(url)
            assert response.status_code == 200, response.get_data(as_text=True)[:500]
            return response.get_json()

        times, body = timed(get, args.repeats)
        print(f"http     : GET /api/v1/rankings (main query, JSON) median "
              f"{statistics.median(times) * 1000:.1f} ms; {len(body['rows'])} rows, "
              f"total {body['total']:,}")

    # new chunk files must be seen by the next query
    store_now = Store(root)
    before = current.rankings(store_now, current.RankingQuery(all_results=True, limit=0))[1]
    extra = root.parent / (root.name + "-fresh-probe")
    batch_id = current.new_batch_id(T0 + timedelta(days=3650))
    schema = real_summary_schema()
    table = chunk_table(schema, np.random.default_rng(7), 10, np.array([0]), T0 + timedelta(days=3650),
                        9999, 0)
    store_now.write_table("summaries", batch_id, 0, table)
    try:
        after = current.rankings(store_now, current.RankingQuery(all_results=True, limit=0))[1]
        fresh = after == before + 10
        ok &= fresh
        print(f"fresh    : a new batch of 10 rows is seen by the next query: "
              f"{'yes' if fresh else 'NO'} ({before:,} -> {after:,})")
    finally:
        shutil.rmtree(root / "summaries" / f"batch_id={batch_id}", ignore_errors=True)
        shutil.rmtree(extra, ignore_errors=True)
    print(f"result   : {'OK' if ok else 'MISMATCH'}")
    return 0 if ok else 1


def _app_for(root: Path):
    """The real app on the store: no tokens (open on loopback), nothing queued."""
    from sorbrank.service.app import create_app
    from sorbrank.service.config import load_settings

    settings = load_settings({"SORBRANK_DATA_DIR": str(root)})
    return create_app(settings, enqueue=lambda batch_id, chunk: None, queue_depth=lambda: 0)


if __name__ == "__main__":
    sys.exit(main())
