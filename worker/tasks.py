"""Celery tasks: thin wrappers around worker.jobs, idempotent by construction."""
from __future__ import annotations

import logging

from celery.signals import worker_ready

from . import jobs
from .celery_app import MAX_RETRIES, app, data_dir
from .store import Store

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
    except Exception as exc:  # noqa: BLE001 - recorded below once retries run out
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
    except Exception:  # noqa: BLE001 - a failed reconcile must not stop the worker
        log.exception("reconcile on start failed; unfinished batches wait for the next start")
