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

Environment: SORBRANK_BROKER_URL (required, redis://host:port/db),
SORBRANK_DATA_DIR (the same store the API writes, default ./data),
SORBRANK_TASK_SOFT_LIMIT_S / SORBRANK_TASK_HARD_LIMIT_S (time limits per
chunk in seconds, default 1500 / 1800), SORBRANK_TASK_MAX_RETRIES
(default 2)."""
EPILOG = """\
example:
  SORBRANK_BROKER_URL=redis://10.0.0.5:6379/0 SORBRANK_DATA_DIR=/shared/sorbrank \\
      sorbrank worker --concurrency 8"""


def register(subparsers) -> None:
    p = subparsers.add_parser("worker", help=HELP, description=DESCRIPTION, epilog=EPILOG,
                              formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--concurrency", type=int, default=os.cpu_count() or 1,
                   help="worker processes, each fitting one chunk at a time "
                        "(default: number of cores, here %(default)s)")
    p.add_argument("--loglevel", default="INFO", choices=["DEBUG", "INFO", "WARNING", "ERROR"],
                   help="log level (default INFO)")
    p.set_defaults(func=run)


def run(args) -> int:
    from ..config import ConfigError, load_settings

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
    if args.concurrency < 1:
        print("sorbrank worker: --concurrency must be at least 1", file=sys.stderr)
        return 2
    from worker.celery_app import QUEUE, app

    app.worker_main(["worker", f"--concurrency={args.concurrency}", "--pool=prefork",
                     f"--loglevel={args.loglevel}", f"--queues={QUEUE}",
                     f"--hostname=sorbrank-{os.getpid()}@%h", "--without-gossip",
                     "--without-mingle"])
    return 0
