"""Embedded mode: run chunk jobs on a local process pool, no broker needed.

The same ``jobs.execute_chunk`` the Celery task wraps runs here in child
processes (one per core by default). State lives in the store, so stopping
the server loses nothing: ``resume`` re-enqueues unfinished chunks on start.
"""
from __future__ import annotations

import logging
import multiprocessing
import os
import threading
import time
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path

from . import jobs, logs
from .store import Store

log = logging.getLogger(__name__)

# How often a pool process checks that the server that started it still lives
PARENT_POLL_S = 0.5


def _init_child(parent_pid: int) -> None:
    logs.configure_from_env()  # spawned children start without logging
    threading.Thread(target=_exit_when_orphaned, args=(parent_pid,), daemon=True,
                     name="sorbrank-parent-watch").start()


def _exit_when_orphaned(parent_pid: int) -> None:
    # A SIGKILLed server runs no shutdown, and a pool process blocked on its
    # task queue never sees EOF (it holds that pipe's write end itself), so it
    # would live on with its memory. Polling the parent pid, rather than
    # prctl(PR_SET_PDEATHSIG): the pool spawns processes on demand from
    # whichever request thread submits, and PDEATHSIG fires when that *thread*
    # ends, which would kill healthy workers after every request. A chunk cut
    # short here is still "running" on disk and resumes at the next start.
    while os.getppid() == parent_pid:
        time.sleep(PARENT_POLL_S)
    os._exit(1)


def _run(data_dir: str, batch_id: str, chunk_index: int) -> None:
    jobs.execute_chunk(Store(data_dir), batch_id, chunk_index)


class EmbeddedExecutor:
    def __init__(self, data_dir: str | Path, workers: int | None = None):
        self.store = Store(data_dir)
        self.workers = workers or os.cpu_count() or 1
        self._lock = threading.Lock()
        self._pending = 0  # chunks submitted and not yet finished (the queue depth)
        self._pool = self._new_pool()

    def _new_pool(self) -> ProcessPoolExecutor:
        # spawn, not fork: the parent runs server threads whose locks a fork would copy
        return ProcessPoolExecutor(max_workers=self.workers,
                                   mp_context=multiprocessing.get_context("spawn"),
                                   initializer=_init_child, initargs=(os.getpid(),))

    def pending_chunks(self) -> int:
        with self._lock:
            return self._pending

    def enqueue(self, batch_id: str, chunk_index: int) -> None:
        with self._lock:
            try:
                future = self._pool.submit(_run, str(self.store.root), batch_id, chunk_index)
            except BrokenProcessPool:
                self._pool = self._new_pool()
                future = self._pool.submit(_run, str(self.store.root), batch_id, chunk_index)
            self._pending += 1
        future.add_done_callback(lambda f: self._settle(f, batch_id, chunk_index))

    def _settle(self, future: Future, batch_id: str, chunk_index: int) -> None:
        with self._lock:
            self._pending -= 1
        if future.cancelled():
            return  # shutting down: the chunk stays unsettled and resumes next start
        exc = future.exception()
        if exc is None:
            return
        # the child died (killed, out of memory) before it could record anything
        log.error("chunk %s of batch %s: worker process failed: %r", chunk_index, batch_id, exc)
        try:
            jobs.record_chunk_failure(self.store, batch_id, chunk_index,
                                      f"worker process failed: {type(exc).__name__}: {exc}")
            jobs.finalize_batch(self.store, batch_id)
        except Exception:  # logged; reconcile on next start retries
            log.exception("could not record failure of chunk %s of batch %s", chunk_index, batch_id)

    def resume(self) -> list[tuple[str, int]]:
        return jobs.reconcile(self.store, self.enqueue)

    def shutdown(self) -> None:
        self._pool.shutdown(wait=False, cancel_futures=True)
