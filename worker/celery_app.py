"""The Celery application. Configuration comes from the environment only,
read by ``sorbrank.worker.settings`` (the parser and rules the API uses; see
that module for every variable): SORBRANK_BROKER_URL, SORBRANK_DATA_DIR,
SORBRANK_TASK_SOFT_LIMIT_S, SORBRANK_TASK_HARD_LIMIT_S,
SORBRANK_TASK_MAX_RETRIES, SORBRANK_RECONCILE_INTERVAL_S and
SORBRANK_LOG_LEVEL (logs are JSON lines, worker/logs.py, in every pool process).

Bad settings stop the import with the message ``sorbrank serve`` would print,
so ``celery -A sorbrank.worker.celery_app worker`` refuses what the API refuses.
"""
from __future__ import annotations

import logging

from celery import Celery
from celery.signals import setup_logging

from . import logs
from .settings import ConfigError, load_shared

try:
    SETTINGS = load_shared()
except ConfigError as exc:
    # SystemExit, not a traceback: the celery command prints this message and stops
    raise SystemExit(f"sorbrank celery app: {exc}") from None


def data_dir() -> str:
    # a string, not a Path: Path("s3://bucket/x") would fold the "//"
    return str(SETTINGS.data_dir)


SOFT_LIMIT_S = SETTINGS.task_soft_limit_s
HARD_LIMIT_S = SETTINGS.task_hard_limit_s
MAX_RETRIES = SETTINGS.task_max_retries
QUEUE = "sorbrank"

app = Celery("sorbrank", broker=SETTINGS.broker_url, include=["sorbrank.worker.tasks"])
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
def json_logs(loglevel: int | str | None = None, **_: object) -> None:
    # connecting here tells Celery not to configure logging itself; forked pool
    # processes inherit this handler. Celery's --loglevel wins over the environment.
    logs.configure(logging.getLevelName(loglevel) if isinstance(loglevel, int) else None)
