"""``sorbrank worker``: a Celery worker fitting queued chunks (distributed mode)."""
from __future__ import annotations

import argparse
import os
import sys

HELP = "run a Celery worker that fits queued batches (distributed mode, needs Redis)"
DESCRIPTION = """\
Run a Celery worker that takes batch chunks from Redis and fits them. Each
worker process handles one chunk at a time; chunks are acknowledged only
after their results are on disk, so a worker that dies hands its chunk back.
At start the worker re-queues every chunk the store says is unfinished, so
batches survive a Redis that lost its queue.

At start the store root must be writable and the broker must answer a PING
within 3 s; otherwise the command exits with status 2 and one message naming
the variable. Logs are JSON lines on stderr, one per chunk start and finish
with its batch id.

Environment: SORBRANK_BROKER_URL (required, redis://host:port/db),
SORBRANK_DATA_DIR (the same store the API writes: a path or a URI such as
s3://bucket/prefix, default ./data), SORBRANK_WORKER_CONCURRENCY (default
for --concurrency), SORBRANK_LOG_LEVEL (default for --loglevel),
SORBRANK_WORKER_METRICS_PORT / SORBRANK_WORKER_METRICS_HOST (serve the
store's Prometheus metrics at http://HOST:PORT/metrics; unset = off; host
default 0.0.0.0), SORBRANK_TASK_SOFT_LIMIT_S / SORBRANK_TASK_HARD_LIMIT_S
(time limits per chunk in seconds, default 1500 / 1800),
SORBRANK_TASK_MAX_RETRIES (default 2)."""
EPILOG = """\
example:
  SORBRANK_BROKER_URL=redis://10.0.0.5:6379/0 SORBRANK_DATA_DIR=/shared/sorbrank \\
      sorbrank worker --concurrency 8"""


def register(subparsers) -> None:
    p = subparsers.add_parser("worker", help=HELP, description=DESCRIPTION, epilog=EPILOG,
                              formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--concurrency", type=int, default=None,
                   help="worker processes, each fitting one chunk at a time (default: "
                        f"SORBRANK_WORKER_CONCURRENCY, else the number of cores, here "
                        f"{os.cpu_count() or 1})")
    p.add_argument("--loglevel", default=None, choices=["DEBUG", "INFO", "WARNING", "ERROR"],
                   help="log level (default: SORBRANK_LOG_LEVEL, else INFO)")
    p.set_defaults(func=run)


def run(args) -> int:
    from ..config import ConfigError, load_settings, start_problems

    try:
        settings = load_settings()
    except ConfigError as exc:
        print(f"sorbrank worker: {exc}", file=sys.stderr)
        return 2
    if not settings.broker_url:
        print("sorbrank worker: SORBRANK_BROKER_URL is not set; a worker needs Redis "
              "(embedded mode needs no worker: 'sorbrank serve' fits batches itself)",
              file=sys.stderr)
        return 2
    concurrency = args.concurrency or settings.worker_concurrency
    if concurrency < 1:
        print("sorbrank worker: --concurrency must be at least 1", file=sys.stderr)
        return 2
    problems = start_problems(settings)
    if problems:
        print(f"sorbrank worker: {ConfigError(problems)}", file=sys.stderr)
        return 2
    if settings.worker_metrics_port is not None:
        problem = _serve_metrics(settings)
        if problem:
            print(f"sorbrank worker: {problem}", file=sys.stderr)
            return 2
    loglevel = args.loglevel or settings.log_level
    os.environ["SORBRANK_LOG_LEVEL"] = loglevel  # read by the JSON log setup (worker/logs.py)
    from sorbrank.worker import logs
    from sorbrank.worker.celery_app import QUEUE, app

    logs.configure(loglevel)  # before Celery starts: its start-up warnings are JSON too

    # --quiet: no banner, so stderr carries JSON log lines only
    app.worker_main(["--quiet", "worker", f"--concurrency={concurrency}", "--pool=prefork",
                     f"--loglevel={loglevel}", f"--queues={QUEUE}",
                     f"--hostname=sorbrank-{os.getpid()}@%h", "--without-gossip",
                     "--without-mingle"])
    return 0


def _serve_metrics(settings) -> str | None:
    """Serve the store's Prometheus metrics from this (main) worker process."""
    from prometheus_client import start_http_server

    from sorbrank.worker.store import Store

    from ..metrics import broker_queue_depth, make_registry

    registry = make_registry(Store(settings.data_dir), broker_queue_depth(settings.broker_url))
    try:
        start_http_server(settings.worker_metrics_port, addr=settings.worker_metrics_host,
                          registry=registry)
    except OSError as exc:
        return (f"SORBRANK_WORKER_METRICS_PORT={settings.worker_metrics_port}: cannot listen on "
                f"{settings.worker_metrics_host} ({exc.strerror or exc})")
    return None
