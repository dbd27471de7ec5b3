"""API ingest: Parquet batches POSTed to a real ``sorbrank serve`` on loopback.

1. Generate one batch of --isotherms isotherms x 30 points (Langmuir-shaped
   CO2 / N2 / CH4 data at 273-313 K, 1 % noise, fixed seed; one row per point,
   the documented input columns, units Pa and mol/kg) as Parquet, once.
2. accepted: a ``sorbrank serve`` in distributed mode whose queue nobody
   consumes (a redis-server on a free loopback port, no worker), so nothing
   but intake competes for the CPU. --posts POSTs of that body, one after the
   other; each 202 means the normalised inputs and the manifest are on disk
   (fsynced). Printed: the median time per POST and isotherms/s accepted.
   With --baseline REV the same is measured against the code of git revision
   REV (``git archive`` into a temp dir, served from there), side by side.
3. end-to-end: a second server on a fresh store and redis database, plus two
   ``sorbrank worker`` processes (one fitting process each); --e2e-batches
   batches of --e2e-isotherms POSTed at once, then the time from the first
   POST until every batch is done (GET /batches/{id}, polled). Printed:
   isotherms/s end to end. With --e2e-chunk-sizes 500,2000 this runs once
   per SORBRANK_CHUNK_SIZE (fresh store, redis database and workers each
   time, one after the other) and prints the ratios.

Every process runs in its own process group on 127.0.0.1 with temp data
dirs, and all are stopped at the end (also on failure). Exit status 0 only
when every POST was accepted and every batch finished ``done`` with all its
isotherms. Target the project reports against: >= 5,000 isotherms/s accepted.
Nothing here asserts a time.

    .venv/bin/python benchmarks/bench_ingest.py                       # 10,000 x 5 posts, 2 x 10,000 e2e
    .venv/bin/python benchmarks/bench_ingest.py --isotherms 60 --posts 2 --e2e-batches 2
    .venv/bin/python benchmarks/bench_ingest.py --e2e-chunk-sizes 500,2000
"""
from __future__ import annotations

import argparse
import hashlib
import io
import json
import os
import shutil
import statistics
import sys
import tempfile
import time
import uuid
from pathlib import Path

import numpy as np

from local_procs import LOOPBACK, Procs, code_at, free_port, start_redis, wait_for

ROOT = Path(__file__).resolve().parents[1]
N_POINTS = 30
TOKEN = "bench-ingest-" + uuid.uuid4().hex


def batch_parquet(n: int, seed: int = 7, tag: str = "ING") -> bytes:
    """``n`` isotherms x 30 points as Parquet bytes (one row per point)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    sorbent = np.arange(n) // 3                       # three isotherms per sorbent
    adsorbate = np.array(["CO2", "N2", "CH4"])[np.arange(n) % 3]
    temperature = np.array([273.15, 298.15, 313.15])[rng.integers(0, 3, n)]
    grid = np.linspace(0.0, 1.0, N_POINTS)[None]
    pressure = 10 ** rng.uniform(0.5, 2.0, (n, 1)) * (10 ** rng.uniform(3.0, 4.0, (n, 1))) ** grid
    q_sat, b = rng.uniform(1.0, 10.0, (n, 1)), 10 ** rng.uniform(-5.0, -3.5, (n, 1))
    loading = q_sat * b * pressure / (1 + b * pressure)
    loading = np.abs(loading * (1 + 0.01 * rng.standard_normal((n, N_POINTS))))
    rep = lambda v: np.repeat(v, N_POINTS)  # noqa: E731
    table = pa.table({
        "isotherm_id": pa.array(rep(np.array([f"{tag}-{i:06d}" for i in range(n)])), pa.string()),
        "sorbent_id": pa.array(rep(np.array([f"{tag}-M{m:06d}" for m in sorbent])), pa.string()),
        "adsorbate": pa.array(rep(adsorbate), pa.string()),
        "temperature_k": pa.array(rep(temperature), pa.float64()),
        "pressure_pa": pa.array(pressure.ravel(), pa.float64()),
        "loading_mol_per_kg": pa.array(loading.ravel(), pa.float64()),
    })
    sink = io.BytesIO()
    pq.write_table(table, sink)
    return sink.getvalue()


def env_for(data_dir: Path, broker_url: str, code_dir: Path) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith("SORBRANK_")}
    env.update(PYTHONUNBUFFERED="1", PYTHONPATH=str(code_dir),
               SORBRANK_DATA_DIR=str(data_dir), SORBRANK_BROKER_URL=broker_url,
               SORBRANK_MAX_UPLOAD_BYTES=str(256 * 1024 * 1024),
               SORBRANK_TOKENS=json.dumps([{"name": "bench", "scopes": ["submit", "read"],
                                            "sha256": hashlib.sha256(TOKEN.encode()).hexdigest()}]))
    return env


def start_server(procs: Procs, name: str, env: dict, code_dir: Path) -> str:
    import requests

    port = free_port()
    procs.start(name, [sys.executable, "-m", "sorbrank.service.cli", "serve", "--host", LOOPBACK,
                       "--port", str(port)], env, cwd=code_dir)
    url = f"http://{LOOPBACK}:{port}"

    def up():
        try:
            return requests.get(url + "/healthz", timeout=2).status_code == 200
        except requests.RequestException:
            return False

    wait_for(up, f"{name} /healthz", procs, 120)
    return url


def post(session, url: str, body: bytes) -> tuple[float, dict]:
    started = time.perf_counter()
    resp = session.post(url + "/api/v1/batches", data=body, timeout=600,
                        headers={"Content-Type": "application/vnd.apache.parquet"})
    elapsed = time.perf_counter() - started
    if resp.status_code != 202:
        raise SystemExit(f"POST answered {resp.status_code}: {resp.text[:1000]}")
    return elapsed, resp.json()


def accepted_rate(procs: Procs, label: str, code_dir: Path, broker: str, work: Path,
                  body: bytes, n: int, posts: int) -> float:
    import requests

    env = env_for(work / f"store-{label}", broker, code_dir)
    url = start_server(procs, f"server-{label}", env, code_dir)
    session = requests.Session()
    session.headers["Authorization"] = f"Bearer {TOKEN}"
    post(session, url, body)  # warm-up: first-use imports (property tables) are not intake
    times = []
    for _ in range(posts):
        elapsed, answer = post(session, url, body)
        if answer["accepted"] != n:
            raise SystemExit(f"{label}: accepted {answer['accepted']} of {n}")
        times.append(elapsed)
    median = statistics.median(times)
    print(f"accepted : {label:<8} median {median:6.3f} s per POST of {n:,} isotherms "
          f"-> {n / median:8,.0f} isotherms/s (202 = inputs durable; {posts} posts, "
          f"min {min(times):.3f} s, max {max(times):.3f} s)", flush=True)
    return n / median


def end_to_end(work: Path, broker_url: str, bodies: list[bytes], n: int, chunk_size: int | None,
               timeout_s: float) -> tuple[float, bool]:
    """POST ``bodies`` at once to a fresh server + two workers; (isotherms/s, all done).

    ``chunk_size`` sets SORBRANK_CHUNK_SIZE (None: the service's default).
    Its processes are stopped before returning, so runs do not compete.
    """
    import requests

    label = "default" if chunk_size is None else str(chunk_size)
    procs = Procs(work)
    try:
        env = env_for(work / f"store-e2e-{label}", broker_url, ROOT)
        if chunk_size is not None:
            env["SORBRANK_CHUNK_SIZE"] = str(chunk_size)
        for k in range(2):
            _, log = procs.start(f"worker-{label}-{k}", [sys.executable, "-m", "sorbrank.service.cli",
                                                         "worker", "--concurrency", "1"], env, cwd=ROOT)
            wait_for(lambda log=log: " ready." in log.read_text(errors="replace"),
                     f"worker-{k} ready", procs, 180)
        url = start_server(procs, f"server-e2e-{label}", env, ROOT)
        session = requests.Session()
        session.headers["Authorization"] = f"Bearer {TOKEN}"
        first = time.perf_counter()
        ids = [post(session, url, b)[1]["batch_id"] for b in bodies]
        posted = time.perf_counter() - first

        def all_done():
            states = [session.get(f"{url}/api/v1/batches/{b}", timeout=30).json() for b in ids]
            return states if all(s["state"] in ("done", "failed", "partial") for s in states) \
                else None

        states = wait_for(all_done, "every batch to finish", procs, timeout_s, 0.5)
        total_s = time.perf_counter() - first
        done = sum(s["counts"]["done"] for s in states)
        size_text = "default chunk size" if chunk_size is None else f"SORBRANK_CHUNK_SIZE={chunk_size}"
        print(f"end-to-end: {len(ids)} batches x {n:,} isotherms, 2 workers (distributed), "
              f"{size_text}: {total_s:.1f} s from first POST to all done (POSTs {posted:.1f} s) "
              f"-> {n * len(ids) / total_s:,.0f} isotherms/s; {done:,} done, states "
              f"{sorted(set(s['state'] for s in states))}")
        return n * len(ids) / total_s, all(s["state"] == "done" for s in states) and done == n * len(ids)
    finally:
        procs.stop_all()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--isotherms", type=int, default=10_000, help="isotherms per batch (10,000)")
    ap.add_argument("--posts", type=int, default=5, help="timed POSTs for the accepted rate (5)")
    ap.add_argument("--baseline", default=None,
                    help="also measure the accepted rate with the code of this git revision")
    ap.add_argument("--e2e-batches", type=int, default=2, help="batches end to end (2; 0 skips)")
    ap.add_argument("--e2e-isotherms", type=int, default=None,
                    help="isotherms per end-to-end batch (default --isotherms)")
    ap.add_argument("--e2e-chunk-sizes", type=lambda v: [int(x) for x in v.split(",")], default=None,
                    help="end to end once per SORBRANK_CHUNK_SIZE, side by side (e.g. 500,2000; "
                         "default: the service's default only)")
    ap.add_argument("--timeout-s", type=float, default=1800, help="bound on the end-to-end wait")
    args = ap.parse_args(argv)

    work = Path(tempfile.mkdtemp(prefix="sorbrank-bench-ingest-"))
    procs = Procs(work)
    ok = True
    try:
        started = time.perf_counter()
        body = batch_parquet(args.isotherms)
        print(f"data     : {args.isotherms:,} isotherms x {N_POINTS} points per batch, "
              f"{len(body) / 1e6:.1f} MB Parquet, generated in {time.perf_counter() - started:.1f} s")
        broker = start_redis(procs, work)
        rate = accepted_rate(procs, "current", ROOT, broker + "/0", work, body, args.isotherms,
                             args.posts)
        if args.baseline:
            base_dir = code_at(args.baseline, work / "baseline-code")
            base = accepted_rate(procs, args.baseline, base_dir, broker + "/2", work, body,
                                 args.isotherms, args.posts)
            print(f"ratio    : current / {args.baseline} = {rate / base:.2f}x")
        print(f"target   : >= 5,000 isotherms/s accepted; measured {rate:,.0f}")

        if args.e2e_batches > 0:
            n = args.e2e_isotherms or args.isotherms
            bodies = [batch_parquet(n, seed=100 + k, tag=f"E2E{k}") for k in range(args.e2e_batches)]
            rates = {}
            for db, chunk_size in enumerate(args.e2e_chunk_sizes or [None], start=3):
                rate_e2e, done_ok = end_to_end(work, broker + f"/{db}", bodies, n, chunk_size,
                                               args.timeout_s)
                rates[chunk_size] = rate_e2e
                ok &= done_ok
            if len(rates) > 1:
                first_size, *rest = rates
                for size in rest:
                    print(f"ratio    : end to end, chunks of {size} / chunks of {first_size} = "
                          f"{rates[size] / rates[first_size]:.2f}x")
    finally:
        stopped = procs.stop_all()
        print(f"stopped  : {stopped} process(es)")
        shutil.rmtree(work, ignore_errors=True)
    print(f"result   : {'OK' if ok else 'FAILED'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
