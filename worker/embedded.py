"""Embedded mode: run chunk jobs on a local process pool, no broker needed.

The same ``jobs.execute_chunk`` the Celery task wraps runs here in child
processes (one per core by default). State lives in the store, so stopping
the server loses nothing: ``resume`` re-enqueues unfinished chunks on start,
then a watch thread re-enqueues, every SORBRANK_RECONCILE_INTERVAL_S, each
unfinished chunk the pool does not hold (one that found the store full, one
whose process died before it could settle it), without a restart.
"""
from __future__ import annotations

import collections
import logging
import multiprocessing
import os
import threading
import time
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path

from . import jobs, logs
from .settings import read_shared
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
    def __init__(self, data_dir: str | Path, workers: int | None = None,
                 watch_interval_s: float | None = None):
        self.store = Store(data_dir)
        self.workers = workers or os.cpu_count() or 1
        self._lock = threading.Lock()
        # chunks submitted and not yet finished; their count is the queue depth
        self._held: collections.Counter = collections.Counter()
        self._pool = self._new_pool()
        # the setting the Celery workers' broker watch reads (0 = only at start)
        self.watch_interval_s = (read_shared(os.environ, []).reconcile_interval_s
                                 if watch_interval_s is None else watch_interval_s)
        self._stop_watch = threading.Event()

    def _new_pool(self) -> ProcessPoolExecutor:
        # spawn, not fork: the parent runs server threads whose locks a fork would copy
        return ProcessPoolExecutor(max_workers=self.workers,
                                   mp_context=multiprocessing.get_context("spawn"),
                                   initializer=_init_child, initargs=(os.getpid(),))

    def pending_chunks(self) -> int:
        with self._lock:
            return sum(self._held.values())

    def enqueue(self, batch_id: str, chunk_index: int) -> None:
        with self._lock:
            try:
                future = self._pool.submit(_run, str(self.store.root), batch_id, chunk_index)
            except BrokenProcessPool:
                self._pool = self._new_pool()
                future = self._pool.submit(_run, str(self.store.root), batch_id, chunk_index)
            self._held[(batch_id, chunk_index)] += 1
        future.add_done_callback(lambda f: self._settle(f, batch_id, chunk_index))

    def _settle(self, future: Future, batch_id: str, chunk_index: int) -> None:
        with self._lock:
            self._held[(batch_id, chunk_index)] -= 1
            if self._held[(batch_id, chunk_index)] <= 0:
                del self._held[(batch_id, chunk_index)]
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
        """Queue every unfinished chunk, then start the watch (at most once)."""
        queued = jobs.reconcile(self.store, self.enqueue)
        if self.watch_interval_s > 0 and not getattr(self, "_watch", None):
            self._watch = threading.Thread(target=self._watch_store, daemon=True,
                                           name="sorbrank-embedded-watch")
            self._watch.start()
        return queued

    def requeue_lost(self, suspects: frozenset = frozenset()) -> frozenset:
        """Queue again each unfinished chunk the pool does not hold; the chunks
        to check again next round (see ``jobs.lost_chunks``)."""
        unsettled = jobs.unsettled_chunks(self.store)
        with self._lock:
            held = set(self._held)
        lost, suspects = jobs.lost_chunks(unsettled, held, suspects)
        for batch_id, chunk_index in lost:
            self.enqueue(batch_id, chunk_index)
        if lost:
            log.warning("re-enqueueing %d unfinished chunk(s) the pool does not hold: %s",
                        len(lost), ", ".join(f"{b} chunk {c}" for b, c in lost[:20]))
        return suspects

    def _watch_store(self) -> None:
        suspects: frozenset = frozenset()
        while not self._stop_watch.wait(self.watch_interval_s):
            try:
                suspects = self.requeue_lost(suspects)
                self._finalize_settled()
            except Exception:  # a store briefly unreadable: try again next round
                log.warning("embedded watch: store check failed; next try in %s s",
                            self.watch_interval_s, exc_info=True)

    def _finalize_settled(self) -> None:
        # a batch whose last chunk settled while the store was full has no final.json yet
        for batch_id in self.store.batch_ids():
            if self.store.read_final(batch_id) is None and not jobs.pending_chunks(self.store,
                                                                                   batch_id):
                jobs.finalize_batch(self.store, batch_id)

    def shutdown(self) -> None:
        self._stop_watch.set()
        self._pool.shutdown(wait=False, cancel_futures=True)
