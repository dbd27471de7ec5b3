"""``sorbrank demo``: the whole round trip on the bundled sample batches."""
from __future__ import annotations

import argparse
import collections
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HELP = "start a local server, submit the sample batches, print the ranking"
DESCRIPTION = """\
Run the whole round trip on one machine: start 'sorbrank serve' (embedded
mode, loopback only) as a separate process with its own data directory,
submit every batch file in the sample directory (*.csv, *.json, *.parquet;
names starting with 'ground_truth' or '_' are skipped), wait until every
batch is fitted, print the top sorbents per adsorbate at its most common
temperature (ties: nearest 298.15 K), ranked by working capacity between the
batch's adsorption and desorption pressures (default 1 bar -> 0.1 bar), then
stop the server."""
EPILOG = """\
example:
  sorbrank demo
  sorbrank demo --data-dir ./demo-data --port 8765 --top 10"""
SUFFIXES = (".csv", ".json", ".parquet")


def register(subparsers) -> None:
    p = subparsers.add_parser("demo", help=HELP, description=DESCRIPTION, epilog=EPILOG,
                              formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--data-dir", type=Path,
                   help="store for the demo server (default: a temporary directory, removed after)")
    p.add_argument("--port", type=int, default=0, help="loopback port (default: any free port)")
    p.add_argument("--batches", type=Path, default=None,
                   help="directory of batch files (default: the project's sample_batches/)")
    p.add_argument("--top", type=int, default=20, help="rows per adsorbate (default 20)")
    p.add_argument("--timeout-s", type=float, default=1800.0,
                   help="give up waiting for the batches after this many seconds (default 1800)")
    p.set_defaults(func=run)


def batch_files(directory: Path) -> list[Path]:
    return sorted(p for p in directory.iterdir()
                  if p.is_file() and p.suffix.lower() in SUFFIXES
                  and not p.name.startswith(("ground_truth", "_", ".")))


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _default_batches() -> Path:
    bundled = Path(__file__).resolve().parents[2] / "sample_batches"
    return bundled if bundled.is_dir() else Path("sample_batches")


def run(args) -> int:
    from ..client import ApiError, Client, progress_printer, ranked_table

    batches_dir = args.batches or _default_batches()
    if not batches_dir.is_dir():
        print(f"sorbrank demo: no batch directory {batches_dir} (use --batches DIR)", file=sys.stderr)
        return 2
    files = batch_files(batches_dir)
    if not files:
        print(f"sorbrank demo: no .csv/.json/.parquet batch files in {batches_dir}", file=sys.stderr)
        return 2
    # SIGTERM must reach the finally below, which stops the server process
    signal.signal(signal.SIGTERM, _interrupt)
    data_dir = args.data_dir or Path(tempfile.mkdtemp(prefix="sorbrank-demo-"))
    port = args.port or _free_port()
    env = {k: v for k, v in os.environ.items()
           if k not in ("SORBRANK_BROKER_URL", "SORBRANK_TOKENS", "SORBRANK_TOKENS_FILE")}
    env["SORBRANK_DATA_DIR"] = str(data_dir)
    data_dir.mkdir(parents=True, exist_ok=True)
    log_path = data_dir / "server.log"
    with open(log_path, "ab") as log:
        server = subprocess.Popen([sys.executable, "-m", "sorbrank.service.cli", "serve", "--host",
                                   "127.0.0.1", "--port", str(port)], env=env,
                                  start_new_session=True, stdin=subprocess.DEVNULL,
                                  stdout=log, stderr=log)
    client = Client(f"http://127.0.0.1:{port}")
    try:
        for _ in range(600):  # up to about a minute for the server to come up
            if server.poll() is not None:
                print(f"sorbrank demo: the server exited with status {server.returncode}:\n"
                      + log_path.read_text(errors="replace")[-2000:], file=sys.stderr)
                return 1
            if client.ready():
                break
            time.sleep(0.1)
        else:
            print("sorbrank demo: the server did not become ready", file=sys.stderr)
            return 1
        print(f"demo server on http://127.0.0.1:{port}, store {data_dir} (log: server.log)",
              file=sys.stderr)

        submitted = []
        for path in files:
            try:
                reply = client.submit_file(path)
            except (ApiError, OSError) as exc:
                print(f"{path.name}: not accepted: {exc}", file=sys.stderr)
                continue
            print(f"{path.name}: accepted {reply['accepted']} isotherm(s), "
                  f"{len(reply['rejected'])} issue(s)", file=sys.stderr)
            submitted.append((path, reply["batch_id"]))
        for path, batch_id in submitted:
            client.wait(batch_id, progress_printer(path.name), timeout_s=args.timeout_s)

        winners = client.rankings_document({"limit": 100_000})["rows"]
        temperatures = collections.defaultdict(collections.Counter)
        for row in winners:
            temperatures[row["adsorbate"]][round(row["temperature_k"], 2)] += 1
        for adsorbate in sorted(temperatures):
            # the most measured temperature; ties go to the one nearest ambient
            counts = temperatures[adsorbate]
            temperature_k = max(counts, key=lambda t: (counts[t], -abs(t - 298.15)))
            # screening teams rank on what a sorbent delivers in a process:
            # the working capacity between the batch's adsorption and
            # desorption pressures (default 1 bar -> 0.1 bar)
            doc = client.rankings_document({"adsorbate": adsorbate, "temperature_k": temperature_k,
                                   "sort": "working_capacity_mol_per_kg", "limit": args.top})
            print(f"\n{adsorbate} at {temperature_k} K: top {len(doc['rows'])} of {doc['total']} "
                  f"by working capacity 1 bar -> 0.1 bar (mol/kg)")
            print(ranked_table(doc["rows"], "working_capacity_mol_per_kg"))
        print(f"\n({doc['deduplication'] if temperatures else 'no results'})")
        return 0
    finally:
        _stop(server)
        if args.data_dir is None:
            shutil.rmtree(data_dir, ignore_errors=True)


def _interrupt(signum, frame):
    raise KeyboardInterrupt


def _stop(server: subprocess.Popen) -> None:
    if server.poll() is None:
        os.killpg(server.pid, signal.SIGTERM)
        try:
            server.wait(timeout=20)
        except subprocess.TimeoutExpired:
            os.killpg(server.pid, signal.SIGKILL)
            server.wait(timeout=10)
