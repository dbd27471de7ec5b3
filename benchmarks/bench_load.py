"""Load run: many concurrent clients against distributed mode, on loopback.

Starts its own redis-server (free loopback port, no persistence), two
``sorbrank worker`` processes (one fitting process each) and one
``sorbrank serve``, all on a temporary store, with a bearer token configured
as in production. Then --clients threads each make --submissions POSTs of a
small batch (--isotherms per batch, sorbent ids unique per batch) followed
by one status GET, with an Idempotency-Key per submission (a POST that fails
on the network is retried with the same key, so a retry cannot count twice).
Afterwards it waits (bounded by --timeout-s) until every accepted batch is
settled, and checks through the API:

  * lost: accepted batches that are not ``done``, or have fewer summary rows
    than isotherms;
  * duplicated: isotherms present more than once across results/rankings,
    batches listed more than once;
  * the rankings (latest-wins and ``all=true``) hold exactly the expected rows.

Printed: submissions/s, p50/p99 latency of POST /batches and of the status
GET, and the end-to-end time until every batch was done. Exit status 0 only
when nothing was lost, duplicated or refused. Every process it starts is
stopped at the end. Nothing here asserts a time.

    .venv/bin/python benchmarks/bench_load.py                  # 50 clients x 100
    .venv/bin/python benchmarks/bench_load.py --clients 3 --submissions 3
"""
from __future__ import annotations

import argparse
import collections
import hashlib
import json
import os
import shutil
import sys
import tempfile
import threading
import time
import uuid
import zlib
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

from local_procs import LOOPBACK, Procs, free_port, start_redis, wait_for

ROOT = Path(__file__).resolve().parents[1]
TOKEN = "bench-load-" + uuid.uuid4().hex
PRESSURES_KPA = (1, 2, 5, 10, 20, 40, 60, 80, 100)


def batch_csv(tag: str, n: int) -> bytes:
    lines = ["sorbent_id,adsorbate,temperature_k,pressure_kpa,loading_mol_per_kg"]
    for k in range(n):
        seed = zlib.crc32(f"{tag}-{k}".encode())
        q_sat, b = 1.0 + (seed % 50) / 10, 0.02 + (seed // 50 % 9) / 100
        for p in PRESSURES_KPA:
            lines.append(f"{tag}-{k},CO2,298.15,{p},{q_sat * b * p / (1 + b * p):.6f}")
    return ("\n".join(lines) + "\n").encode()


def percentile(values: list[float], q: float) -> float:
    if not values:
        return float("nan")
    ordered = sorted(values)
    rank = q / 100 * (len(ordered) - 1)
    low = int(rank)
    high = min(low + 1, len(ordered) - 1)
    return ordered[low] + (ordered[high] - ordered[low]) * (rank - low)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--clients", type=int, default=50, help="concurrent clients (default 50)")
    ap.add_argument("--submissions", type=int, default=100,
                    help="batches each client submits (default 100)")
    ap.add_argument("--isotherms", type=int, default=1, help="isotherms per batch (default 1)")
    ap.add_argument("--models", default="all",
                    help="models to fit ('all' or comma-separated ids; default all)")
    ap.add_argument("--workers", type=int, default=2, help="sorbrank worker processes (default 2)")
    ap.add_argument("--timeout-s", type=float, default=3600,
                    help="longest wait for every batch to settle (default 3600)")
    ap.add_argument("--keep", action="store_true", help="keep the temporary store and logs")
    args = ap.parse_args(argv)
    if min(args.clients, args.submissions, args.isotherms, args.workers) < 1:
        ap.error("--clients, --submissions, --isotherms and --workers must be at least 1")

    import requests

    base = Path(tempfile.mkdtemp(prefix="sorbrank-load-"))
    (base / "logs").mkdir()
    procs = Procs(base / "logs")
    try:
        broker = start_redis(procs, base / "logs") + "/0"
        env = {k: v for k, v in os.environ.items() if not k.startswith("SORBRANK_")}
        env.update(PYTHONPATH=str(ROOT), PYTHONUNBUFFERED="1", SORBRANK_BROKER_URL=broker,
                   SORBRANK_DATA_DIR=str(base / "data"), SORBRANK_TOKENS=json.dumps([{
                       "name": "bench", "sha256": hashlib.sha256(TOKEN.encode()).hexdigest(),
                       "scopes": ["admin"]}]))
        worker_logs = []
        for i in range(args.workers):
            _, log = procs.start(f"worker-{i + 1}", [sys.executable, "-m", "sorbrank.service.cli",
                                                     "worker", "--concurrency", "1"], env)
            worker_logs.append(log)
        port = free_port()
        procs.start("server", [sys.executable, "-m", "sorbrank.service.cli", "serve", "--host", LOOPBACK,
                               "--port", str(port)], env)
        url = f"http://{LOOPBACK}:{port}"
        api = url + "/api/v1"

        def healthy():
            try:
                return requests.get(url + "/healthz", timeout=2).status_code == 200
            except requests.RequestException:
                return False

        wait_for(healthy, "sorbrank serve", procs, 90)
        wait_for(lambda: all(" ready." in log.read_text(errors="replace") for log in worker_logs),
                 "the workers", procs, 120)

        headers = {"Authorization": f"Bearer {TOKEN}", "Content-Type": "text/csv"}
        params = {} if args.models == "all" else {"models": args.models}
        post_ms: list[float] = []
        get_ms: list[float] = []
        accepted: dict[str, int] = {}
        refused: collections.Counter = collections.Counter()
        busy = [0]  # 503 answers waited out (intake slots full): back-pressure, not loss
        lock = threading.Lock()

        def client(c: int) -> None:
            s = requests.Session()
            s.headers.update(headers)
            for i in range(args.submissions):
                tag = f"L{c:03d}-{i:04d}"
                body, key = batch_csv(tag, args.isotherms), f"load-{tag}-{uuid.uuid4().hex}"
                resp, network_tries = None, 0
                # a retry with the same key cannot add a batch; 503 (all intake slots busy)
                # is waited out as its Retry-After says, as sorbrank.Client does
                while network_tries < 3:
                    t0 = time.perf_counter()
                    try:
                        resp = s.post(f"{api}/batches", data=body, params=params, timeout=120,
                                      headers={"Idempotency-Key": key})
                    except requests.RequestException as exc:
                        network_tries += 1
                        with lock:
                            refused[f"network error ({type(exc).__name__}), retried"] += 1
                        continue
                    with lock:
                        post_ms.append((time.perf_counter() - t0) * 1000)
                    if resp.status_code == 503 and "Retry-After" in resp.headers:
                        with lock:
                            busy[0] += 1
                        time.sleep(float(resp.headers["Retry-After"]))
                        continue
                    break
                if resp is None or resp.status_code != 202:
                    with lock:
                        refused[f"HTTP {resp.status_code if resp is not None else 'none'}"] += 1
                    continue
                batch_id = resp.json()["batch_id"]
                t0 = time.perf_counter()
                status = s.get(f"{api}/batches/{batch_id}", timeout=120)
                with lock:
                    get_ms.append((time.perf_counter() - t0) * 1000)
                    if batch_id in accepted:
                        refused["same batch id for two submissions"] += 1
                    accepted[batch_id] = args.isotherms
                    if status.status_code != 200:
                        refused[f"status GET {status.status_code}"] += 1

        total = args.clients * args.submissions
        print(f"load: {args.clients} clients x {args.submissions} submissions = {total} batches "
              f"of {args.isotherms} isotherm(s), models {args.models}, {args.workers} workers",
              flush=True)
        started = time.perf_counter()
        with ThreadPoolExecutor(max_workers=args.clients) as pool:
            for future in [pool.submit(client, c) for c in range(args.clients)]:
                future.result()
        submit_s = time.perf_counter() - started

        s = requests.Session()
        s.headers["Authorization"] = f"Bearer {TOKEN}"

        def settled():
            unsettled = sum(s.get(f"{api}/batches", params={"state": state, "limit": 1},
                                  timeout=300).json()["total"] for state in ("queued", "running"))
            return unsettled == 0

        wait_for(settled, "every batch to settle", procs, args.timeout_s, interval_s=1.0)
        end_to_end_s = time.perf_counter() - started

        # -- the checks -------------------------------------------------------------
        listed = []
        for offset in range(0, len(accepted) + 1000, 1000):
            page = s.get(f"{api}/batches", params={"limit": 1000, "offset": offset},
                         timeout=300).json()["batches"]
            listed += page
            if len(page) < 1000:
                break
        states = collections.Counter(b["state"] for b in listed)
        listed_ids = collections.Counter(b["batch_id"] for b in listed)
        not_done = [b for b in listed if b["batch_id"] in accepted and b["state"] != "done"]
        missing = set(accepted) - set(listed_ids)

        import pyarrow as pa

        def arrow(params):
            resp = s.get(f"{api}/rankings", params={**params, "format": "arrow",
                                                    "limit": 100_000}, timeout=600)
            resp.raise_for_status()
            return pa.ipc.open_stream(resp.content).read_all()

        everything = arrow({"all": "true"})
        latest = arrow({})
        expected_rows = sum(accepted.values())
        pairs = collections.Counter(zip(everything["batch_id"].to_pylist(),
                                        everything["isotherm_id"].to_pylist()))
        per_batch = collections.Counter(b for b, _ in pairs.elements())
        duplicated = sum(n - 1 for n in pairs.values() if n > 1) + sum(
            n - 1 for n in listed_ids.values() if n > 1)
        short = [b for b, n in accepted.items() if per_batch.get(b, 0) < n]
        lost = len(missing | {b["batch_id"] for b in not_done} | set(short))

        print(f"submissions     : {len(accepted)} accepted of {total}; refused/errors "
              f"{dict(refused) or 0}")
        print(f"busy (503)      : {busy[0]} answers waited out as Retry-After said")
        print(f"submission rate : {len(accepted) / submit_s:.1f} submissions/s "
              f"({submit_s:.1f} s for all)")
        print(f"POST /batches   : p50 {percentile(post_ms, 50):.1f} ms  p99 "
              f"{percentile(post_ms, 99):.1f} ms  (n={len(post_ms)})")
        print(f"GET status      : p50 {percentile(get_ms, 50):.1f} ms  p99 "
              f"{percentile(get_ms, 99):.1f} ms  (n={len(get_ms)})")
        print(f"end-to-end      : every batch settled {end_to_end_s:.1f} s after the first "
              f"submission; states {dict(states)}")
        print(f"rankings        : all=true {everything.num_rows} rows, latest-wins "
              f"{latest.num_rows} rows, expected {expected_rows}")
        print(f"check           : lost {lost}, duplicated {duplicated}")
        ok = (lost == 0 and duplicated == 0 and not refused and everything.num_rows
              == latest.num_rows == expected_rows and len(listed) == len(accepted))
        print("result          : " + ("OK" if ok else "FAILED"))
        return 0 if ok else 1
    finally:
        procs.stop_all()
        if args.keep:
            print(f"kept {base}")
        else:
            shutil.rmtree(base, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
