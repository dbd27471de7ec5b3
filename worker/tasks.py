"""Celery tasks: thin wrappers around sorbrank.worker.jobs, idempotent by construction."""
from __future__ import annotations

import base64
import json
import logging
import threading

from celery import Task
from celery.exceptions import SoftTimeLimitExceeded
from celery.signals import worker_ready, worker_shutdown

from . import fs, jobs
from .celery_app import MAX_RETRIES, QUEUE, SETTINGS, SOFT_LIMIT_S, app, data_dir
from .interrupts import register_job_ending
from .store import DamagedFile, Store

# the soft time limit ends the chunk; the fit path's broad handlers must not take it for a fit error
register_job_ending(SoftTimeLimitExceeded)

# How often a worker checks the broker for lost chunks (seconds; 0 = never)
RECONCILE_INTERVAL_S = SETTINGS.reconcile_interval_s
# kombu's Redis transport keeps in-flight (unacknowledged) messages in this hash
_UNACKED_KEY = "unacked"
_stop_watch = threading.Event()
# longest wait between two tries of a chunk that found the store full (seconds)
SPACE_RETRY_MAX_S = 30

log = logging.getLogger(__name__)


@app.task(bind=True, name="sorbrank.fit_chunk", max_retries=MAX_RETRIES)
def fit_chunk(self: Task, batch_id: str, chunk_index: int) -> None:
    store = Store(data_dir())
    try:
        jobs.run_chunk(store, batch_id, chunk_index)
    except jobs.UnknownBatch:
        log.error("chunk %s of batch %s: not in the store %s; dropped", chunk_index, batch_id,
                  store.root)
        return
    except jobs.StoreFull as exc:
        # not the chunk's failure: it waits for space however long that takes,
        # its retries and attempts untouched
        raise self.retry(exc=exc, countdown=min(2 ** self.request.retries, SPACE_RETRY_MAX_S),
                         max_retries=None)
    except Exception as exc:  # recorded below once retries run out
        hopeless = isinstance(exc, (jobs.AttemptsExhausted, DamagedFile))  # a rerun cannot help
        if self.request.retries < self.max_retries and not hopeless:
            raise self.retry(exc=exc, countdown=2 ** self.request.retries)
        log.exception("chunk %s of batch %s failed for good", chunk_index, batch_id)
        jobs.record_chunk_failure(store, batch_id, chunk_index,
                                  failure_message(exc, self.request.retries + 1))
    try:
        jobs.finalize_batch(store, batch_id)
    except OSError as exc:
        if not fs.out_of_space(exc):
            raise
        # the broker watch's reconcile finalizes the batch once space is freed
        log.warning("batch %s: store full while finalizing it", batch_id)


def failure_message(exc: Exception, tries: int) -> str:
    """What a failed chunk's status says about the error that ended its last try."""
    if isinstance(exc, SoftTimeLimitExceeded):
        return (f"time limit: the chunk was still being fitted after "
                f"SORBRANK_TASK_SOFT_LIMIT_S={SOFT_LIMIT_S} s on each of {tries} tries; "
                f"raise the limit or lower SORBRANK_CHUNK_SIZE")
    return f"{type(exc).__name__}: {exc}"


def enqueue(batch_id: str, chunk_index: int) -> None:
    fit_chunk.apply_async((batch_id, chunk_index), retry=True)


@worker_ready.connect
def reconcile_on_start(**_: object) -> None:
    # Redis may have lost queued chunks (restart without AOF, flush): the store
    # knows which batches are unfinished, so enqueue their missing chunks again
    try:
        jobs.reconcile(Store(data_dir()), enqueue)
    except Exception:  # a failed reconcile must not stop the worker
        log.exception("reconcile on start failed; unfinished batches wait for the next start")


def chunks_in_broker() -> set[tuple[str, int]]:
    """(batch id, chunk index) of every chunk message the broker holds, queued or in flight."""
    with app.connection_for_read() as conn:
        pipe = conn.default_channel.client.pipeline()  # MULTI/EXEC: one snapshot of both
        pipe.lrange(QUEUE, 0, -1)
        pipe.hvals(_UNACKED_KEY)
        queued, in_flight = pipe.execute()
    messages = [json.loads(raw) for raw in queued]
    messages += [json.loads(raw)[0] for raw in in_flight]  # [message, exchange, routing key]
    held = set()
    for message in messages:
        if (message.get("headers") or {}).get("task") != fit_chunk.name:
            continue
        body = message["body"]
        if (message.get("properties") or {}).get("body_encoding") == "base64":
            body = base64.b64decode(body)
        batch_id, chunk_index = json.loads(body)[0]  # protocol 2 body: [args, kwargs, embed]
        held.add((batch_id, int(chunk_index)))
    return held


def reconcile_lost_chunks(suspects: frozenset = frozenset()) -> frozenset:
    """Re-enqueue each unfinished chunk the broker holds no message for; return the
    chunks to check again next round.

    Messages are acknowledged only after a chunk's files are written, and a retry
    publishes its new message before the old one is acknowledged, so a *running*
    chunk without a message is lost: a hard time limit killed its process (Celery
    acknowledges such a task), or Redis forgot it. It is queued again at once,
    whether or not other chunks wait in the queue. A *queued* chunk without a
    message may belong to a batch the API is enqueueing this very moment, so it
    is queued again only when it is still missing at the next check (``suspects``).
    A chunk caught in a race runs twice, which only rewrites the same files.
    """
    unsettled = jobs.unsettled_chunks(Store(data_dir()))  # the store first, then the broker:
    if not unsettled:                                     # a chunk settling in between is
        return frozenset()                                # then re-run at worst, never lost
    lost, suspects = jobs.lost_chunks(unsettled, chunks_in_broker(), suspects)
    for batch_id, chunk_index in lost:
        enqueue(batch_id, chunk_index)
    if lost:
        log.warning("re-enqueueing %d unfinished chunk(s) the broker holds no message for: %s",
                    len(lost), ", ".join(f"{b} chunk {c}" for b, c in lost[:20]))
    return suspects


def _watch_broker() -> None:
    suspects: frozenset = frozenset()
    while not _stop_watch.wait(RECONCILE_INTERVAL_S):
        try:
            suspects = reconcile_lost_chunks(suspects)
        except Exception:  # broker down right now: try again next round
            log.debug("broker check failed; next try in %s s", RECONCILE_INTERVAL_S, exc_info=True)


@worker_ready.connect
def start_broker_watch(**_: object) -> None:
    if RECONCILE_INTERVAL_S > 0:
        threading.Thread(target=_watch_broker, name="sorbrank-broker-watch", daemon=True).start()


@worker_shutdown.connect
def stop_broker_watch(**_: object) -> None:
    _stop_watch.set()
