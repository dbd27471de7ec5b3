"""Celery time limits with real processes: a redis-server, a Celery worker and a
``sorbrank serve``, each started by the test, with limits small enough to hit.

A chunk that runs out of time must end as a job (retried, then failed with a
clear message), never as fit results with a model marked failed; and a chunk
whose pool process the hard limit killed must be queued again while the queue
stays busy, not only once it drains.
"""
from __future__ import annotations

import os
import signal
import threading

import pytest
import redis

from conftest import LOOPBACK, free_port, start_server, start_worker, wait_until
from sorbrank.worker.intake import read_batch
from sorbrank.worker.pipeline import process_batch
from sorbrank.worker.store import Store
from test_faults import (
    FINAL_STATES, base_env, batch_csv, chunk_states, descendant_pids, session, start_redis_on,
    submit, wait_final,
)

pytestmark = pytest.mark.integration

QUEUE = "sorbrank"  # sorbrank.worker.celery_app.QUEUE (not imported: it reads the environment)


def distributed(tmp_path, processes, **settings):
    logs = tmp_path / "logs"
    port = free_port()
    start_redis_on(port, logs, processes, "redis")
    broker_url = f"redis://{LOOPBACK}:{port}/0"
    env = base_env(tmp_path, SORBRANK_BROKER_URL=broker_url, **settings)
    worker = start_worker(env, logs, processes)
    server, url = start_server(env, logs, processes)
    return env, worker, server, url + "/api/v1", broker_url


def results(s, api: str, batch_id: str) -> dict:
    resp = s.get(f"{api}/batches/{batch_id}/results", timeout=60)
    assert resp.status_code == 200, resp.text
    return resp.json()


def test_soft_time_limit_fails_the_chunk_instead_of_its_fits(tmp_path, processes):
    """A 2 s soft limit on a 6,000-isotherm chunk (several seconds of fitting) and on a
    12-isotherm chunk (well under a second). The big chunk is tried twice and then
    failed with a message naming the time limit; no stored row anywhere says a model
    failed; the small batch's selections equal those of an unhurried in-process run."""
    env, worker, server, api, _ = distributed(
        tmp_path, processes, SORBRANK_CHUNK_SIZE="6000", SORBRANK_TASK_SOFT_LIMIT_S="2",
        SORBRANK_TASK_HARD_LIMIT_S="120", SORBRANK_TASK_MAX_RETRIES="1")
    s = session()
    big_body, big_ids = batch_csv("SL", 6000)
    small_body, small_ids = batch_csv("SQ", 12)
    big = submit(s, api, big_body)
    small = submit(s, api, small_body)

    big_status = wait_final(s, api, big, [worker, server])
    assert big_status["state"] == "failed", big_status
    assert big_status["counts"] == {"accepted": 6000, "done": 0, "failed": 6000, "rejected": 0}
    [error] = big_status["errors"]
    assert "time limit" in error["message"] and "SORBRANK_TASK_SOFT_LIMIT_S=2" in error["message"]
    chunk = Store(env["SORBRANK_DATA_DIR"]).read_chunk_statuses(big)[0]
    assert chunk["attempts"] == 2  # the first run and one retry
    assert "Soft time limit (2s) exceeded" in worker.log_text()

    small_status = wait_final(s, api, small, [worker, server])
    assert small_status["state"] == "done", small_status
    for batch_id in (big, small):
        fits = results(s, api, batch_id)["fits"]
        failed = [r for r in fits if "internal error" in (r["reason"] or "")
                  or "TimeLimit" in (r["reason"] or "")]
        assert failed == [], failed[:3]
    assert results(s, api, big)["summary"] == []

    stored = results(s, api, small)["summary"]
    unhurried = process_batch(read_batch(small_body, "csv")).summary_table()
    expected = dict(zip(unhurried["isotherm_id"].to_pylist(), unhurried["best_model"].to_pylist()))
    assert sorted(expected) == sorted(small_ids)
    assert {r["isotherm_id"]: r["best_model"] for r in stored} == expected


def test_hard_limited_chunk_is_requeued_while_the_queue_stays_busy(tmp_path, processes):
    """The pool process fitting a one-chunk batch is frozen (SIGSTOP: it cannot even
    take the soft limit's signal, as in a long native call), so the 6 s hard limit kills
    it. A feeder keeps the queue from ever draining. The frozen chunk must be queued
    again within the 1 s reconcile interval and finish while the queue is still busy,
    instead of staying "running" until the queue is empty."""
    env, worker, server, api, broker_url = distributed(
        tmp_path, processes, SORBRANK_CHUNK_SIZE="200", SORBRANK_TASK_SOFT_LIMIT_S="3",
        SORBRANK_TASK_HARD_LIMIT_S="6", SORBRANK_RECONCILE_INTERVAL_S="1")
    s = session()
    data_dir = env["SORBRANK_DATA_DIR"]
    body, _ = batch_csv("HT", 200)  # one chunk of a few tenths of a second
    target = submit(s, api, body)
    wait_until(lambda: chunk_states(data_dir, target) == ["running"], "the chunk to start",
               [worker, server], interval_s=0.01)
    [pool_process] = descendant_pids(worker.popen.pid)  # --concurrency 1: one child
    os.kill(pool_process, signal.SIGSTOP)
    if chunk_states(data_dir, target) != ["running"]:
        pytest.fail("the chunk finished before its process could be frozen")

    broker = redis.Redis.from_url(broker_url, socket_timeout=5)
    stop_feeding = threading.Event()
    fed = []

    def feed():
        while not stop_feeding.is_set():
            if broker.llen(QUEUE) < 4:
                load_body, _ = batch_csv(f"LD{len(fed):03d}", 4)
                fed.append(submit(session(), api, load_body))
            stop_feeding.wait(0.1)

    feeder = threading.Thread(target=feed, daemon=True)
    feeder.start()
    try:
        def settled_while_busy():
            status = s.get(f"{api}/batches/{target}", timeout=10).json()
            if status["state"] not in FINAL_STATES:
                return None
            return status, broker.llen(QUEUE)

        status, queued_then = wait_until(settled_while_busy, f"batch {target} to finish under load",
                                         [worker, server], timeout_s=60, interval_s=0.2)
    finally:
        stop_feeding.set()
        feeder.join(timeout=30)
    assert status["state"] == "done", status
    assert queued_then > 0 and fed  # the queue never drained: the watch did not wait for it
    chunk = Store(data_dir).read_chunk_statuses(target)[0]
    assert chunk["attempts"] == 2, chunk  # the killed run, then the re-queued one
    assert "Hard time limit (6s) exceeded" in worker.log_text()
    assert pool_process not in descendant_pids(worker.popen.pid)
    assert any("re-enqueueing" in line and target in line
               for line in worker.log_text().splitlines())
