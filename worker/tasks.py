"""Celery tasks: thin wrappers around sorbrank.worker.jobs, idempotent by construction."""
from __future__ import annotations

import logging
import threading

from celery.signals import worker_ready, worker_shutdown

from . import jobs
from .celery_app import MAX_RETRIES, QUEUE, SETTINGS, app, data_dir
from .store import Store

# How often a worker checks for a broker that forgot its queue (seconds; 0 = never)
RECONCILE_INTERVAL_S = SETTINGS.reconcile_interval_s
# kombu's Redis transport keeps in-flight (unacknowledged) messages in this hash
_UNACKED_KEY = "unacked"
_stop_watch = threading.Event()

log = logging.getLogger(__name__)


@app.task(bind=True, name="sorbrank.fit_chunk", max_retries=MAX_RETRIES)
def fit_chunk(self, batch_id: str, chunk_index: int) -> None:
    store = Store(data_dir())
    try:
        jobs.run_chunk(store, batch_id, chunk_index)
    except jobs.UnknownBatch:
        log.error("chunk %s of batch %s: not in the store %s; dropped", chunk_index, batch_id,
                  store.root)
        return
    except Exception as exc:  # recorded below once retries run out
        if self.request.retries < self.max_retries and not isinstance(exc, jobs.AttemptsExhausted):
            raise self.retry(exc=exc, countdown=2 ** self.request.retries)
        log.exception("chunk %s of batch %s failed for good", chunk_index, batch_id)
        jobs.record_chunk_failure(store, batch_id, chunk_index, f"{type(exc).__name__}: {exc}")
    jobs.finalize_batch(store, batch_id)


def enqueue(batch_id: str, chunk_index: int) -> None:
    fit_chunk.apply_async((batch_id, chunk_index), retry=True)


@worker_ready.connect
def reconcile_on_start(**_):
    # Redis may have lost queued chunks (restart without AOF, flush): the store
    # knows which batches are unfinished, so enqueue their missing chunks again
    try:
        jobs.reconcile(Store(data_dir()), enqueue)
    except Exception:  # a failed reconcile must not stop the worker
        log.exception("reconcile on start failed; unfinished batches wait for the next start")


def broker_holds_no_chunk() -> bool:
    """True when the broker has no queued and no in-flight chunk message.

    With pending chunks in the store that means the broker lost them (Redis
    restarted without persistence, or was flushed) while the workers lived on.
    """
    with app.connection_for_read() as conn:
        client = conn.default_channel.client
        return client.llen(QUEUE) == 0 and client.hlen(_UNACKED_KEY) == 0


def reconcile_if_broker_forgot() -> list[tuple[str, int]]:
    """Re-enqueue unfinished chunks when the broker holds none of them.

    Several workers may do this at the same moment: a chunk then runs twice,
    which only rewrites the same files (jobs are idempotent).
    """
    store = Store(data_dir())
    has_pending = any(jobs.pending_chunks(store, b) for b in store.batch_ids()
                      if store.read_final(b) is None)
    if has_pending and broker_holds_no_chunk():
        log.warning("the broker holds no chunk of the unfinished batches: re-enqueueing them")
        return jobs.reconcile(store, enqueue)
    return []


def _watch_broker() -> None:
    while not _stop_watch.wait(RECONCILE_INTERVAL_S):
        try:
            reconcile_if_broker_forgot()
        except Exception:  # broker down right now: try again next round
            log.debug("broker check failed; next try in %s s", RECONCILE_INTERVAL_S, exc_info=True)


@worker_ready.connect
def start_broker_watch(**_):
    if RECONCILE_INTERVAL_S > 0:
        threading.Thread(target=_watch_broker, name="sorbrank-broker-watch", daemon=True).start()


@worker_shutdown.connect
def stop_broker_watch(**_):
    _stop_watch.set()
