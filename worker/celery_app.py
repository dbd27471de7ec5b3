"""The Celery application. Configuration comes from the environment only:

SORBRANK_BROKER_URL           redis://host:port/db (required by ``sorbrank worker``)
SORBRANK_DATA_DIR             store root shared with the API: a path or a URI
                              pyarrow.fs understands (default ./data)
SORBRANK_TASK_SOFT_LIMIT_S    soft time limit per chunk, seconds (default 1500)
SORBRANK_TASK_HARD_LIMIT_S    hard time limit per chunk, seconds (default 1800)
SORBRANK_TASK_MAX_RETRIES     retries after a failed chunk (default 2)
SORBRANK_LOG_LEVEL            DEBUG, INFO, WARNING or ERROR (default INFO); logs are
                              JSON lines (worker/logs.py), in every pool process
"""
from __future__ import annotations

import logging
import os

from celery import Celery
from celery.signals import setup_logging

from . import logs


def env_int(name: str, default: int) -> int:
    raw = os.environ.get(name, "").strip()
    if not raw:
        return default
    try:
        value = int(raw)
    except ValueError:
        raise SystemExit(f"{name} must be a whole number, got {raw!r}") from None
    if value < 0:
        raise SystemExit(f"{name} must not be negative, got {value}")
    return value


def data_dir() -> str:
    # a string, not a Path: Path("s3://bucket/x") would fold the "//"
    return os.environ.get("SORBRANK_DATA_DIR") or "./data"


SOFT_LIMIT_S = env_int("SORBRANK_TASK_SOFT_LIMIT_S", 1500)
HARD_LIMIT_S = max(env_int("SORBRANK_TASK_HARD_LIMIT_S", 1800), SOFT_LIMIT_S + 1)
MAX_RETRIES = env_int("SORBRANK_TASK_MAX_RETRIES", 2)
QUEUE = "sorbrank"

app = Celery("sorbrank", broker=os.environ.get("SORBRANK_BROKER_URL"), include=["sorbrank.worker.tasks"])
app.conf.update(
    task_default_queue=QUEUE,
    task_serializer="json",
    accept_content=["json"],
    task_ignore_result=True,  # state lives in the store, not in a result backend
    # a chunk is acknowledged only after its files are written; a worker that
    # dies mid-chunk hands the message back instead of losing it
    task_acks_late=True,
    task_reject_on_worker_lost=True,
    worker_prefetch_multiplier=1,  # chunks are long: never hoard them on one worker
    task_soft_time_limit=SOFT_LIMIT_S,
    task_time_limit=HARD_LIMIT_S,
    broker_connection_retry_on_startup=True,
    # Redis re-delivers an unacknowledged message after this long; it must
    # outlast the hard limit or a slow chunk would run twice at once
    broker_transport_options={"visibility_timeout": 2 * HARD_LIMIT_S},
    # the API must not hang on a dead broker: the batch is on disk already
    task_publish_retry_policy={"max_retries": 2, "interval_start": 0.2,
                               "interval_step": 0.5, "interval_max": 1.0},
    broker_connection_timeout=3,
    worker_hijack_root_logger=False,
)


@setup_logging.connect
def json_logs(loglevel=None, **_) -> None:
    # connecting here tells Celery not to configure logging itself; forked pool
    # processes inherit this handler. Celery's --loglevel wins over the environment.
    logs.configure(logging.getLevelName(loglevel) if isinstance(loglevel, int) else None)
