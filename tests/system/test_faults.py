"""Fault injection with real processes on loopback.

Each test starts its own redis-server (free port, no persistence), Celery
workers and ``sorbrank serve`` processes, breaks one of them with a real
signal in the middle of a batch, and checks the durability promise: an
accepted batch completes, every isotherm exactly once in results and
rankings. "In the middle" is read from the store's chunk status files
(some chunk settled, some not) and checked again after the kill, so a
batch that finished too early fails the test instead of passing vacuously.
"""
from __future__ import annotations

import collections
import os
import shutil
import signal

import pytest
import requests

from conftest import (
    LOOPBACK, ROOT, TOKENS, Proc, clean_env, free_port, isotherm, start, start_server,
    start_worker, tokens_json, wait_until,
)
from sorbrank.worker.store import Store

pytestmark = pytest.mark.integration

FINAL_STATES = ("done", "failed", "partial")
SETTLED = ("done", "failed")


# -- helpers -------------------------------------------------------------------------

def batch_csv(prefix: str, n: int) -> tuple[bytes, list[str]]:
    """``n`` one-isotherm sorbents with explicit isotherm ids (known by construction)."""
    lines = ["isotherm_id,sorbent_id,adsorbate,temperature_k,pressure_kpa,loading_mol_per_kg"]
    ids = []
    for i in range(n):
        iso = isotherm(f"{prefix}-M{i:03d}", 1.0 + 0.25 * i, 0.02 + 0.01 * (i % 7))
        iso_id = f"{prefix}-I{i:03d}"
        ids.append(iso_id)
        for p, q in zip(iso["pressure"], iso["loading"]):
            lines.append(f"{iso_id},{iso['sorbent_id']},CO2,298.15,{p},{q}")
    return ("\n".join(lines) + "\n").encode(), ids


def session(who: str = "submitter") -> requests.Session:
    s = requests.Session()
    s.headers["Authorization"] = f"Bearer {TOKENS[who][0]}"
    return s


def submit(s: requests.Session, api: str, body: bytes) -> str:
    resp = s.post(f"{api}/batches", data=body, headers={"Content-Type": "text/csv"}, timeout=60)
    assert resp.status_code == 202, resp.text
    return resp.json()["batch_id"]


def chunk_states(data_dir, batch_id: str) -> list[str]:
    store = Store(data_dir)
    manifest = store.read_manifest(batch_id)
    statuses = store.read_chunk_statuses(batch_id)
    return [statuses.get(c["index"], {}).get("state", "queued") for c in manifest["chunks"]]


def wait_mid_way(data_dir, batch_id: str, procs: list[Proc]) -> list[str]:
    """Until at least two chunks are settled and one is running, the rest not yet."""
    def mid():
        states = chunk_states(data_dir, batch_id)
        settled = sum(s in SETTLED for s in states)
        if settled == len(states):
            pytest.fail(f"batch {batch_id} finished before the fault could be injected")
        return states if settled >= 2 and "running" in states else None

    return wait_until(mid, f"batch {batch_id} to be mid-way", procs, timeout_s=120,
                      interval_s=0.02)


def kill_group(proc: Proc, sig=signal.SIGKILL) -> None:
    """A real crash: ``sig`` to the process and its pool children, then reap."""
    try:
        os.killpg(proc.popen.pid, sig)
    except ProcessLookupError:
        pass
    proc.popen.wait(timeout=30)


def wait_final(s: requests.Session, api: str, batch_id: str, procs: list[Proc]) -> dict:
    def final():
        try:
            status = s.get(f"{api}/batches/{batch_id}", timeout=10).json()
        except requests.RequestException:
            return None
        return status if status["state"] in FINAL_STATES else None

    return wait_until(final, f"batch {batch_id} to finish", procs, timeout_s=180, interval_s=0.2)


def assert_exactly_once(s: requests.Session, api: str, batch_id: str, ids: list[str]) -> None:
    status = s.get(f"{api}/batches/{batch_id}", timeout=10).json()
    assert status["state"] == "done", status
    assert status["counts"]["accepted"] == status["counts"]["done"] == len(ids)
    assert status["counts"]["failed"] == 0

    results = s.get(f"{api}/batches/{batch_id}/results", timeout=30).json()
    per_iso = collections.Counter(r["isotherm_id"] for r in results["summary"])
    assert set(per_iso) == set(ids), set(per_iso) ^ set(ids)
    assert set(per_iso.values()) == {1}, {k: v for k, v in per_iso.items() if v != 1}
    fits = collections.Counter(r["isotherm_id"] for r in results["fits"])
    n_models = len({r["model"] for r in results["fits"]})
    assert set(fits) == set(ids) and set(fits.values()) == {n_models}, fits

    ranked = s.get(f"{api}/rankings", params={"batch_id": batch_id, "all": "true",
                                              "limit": 10_000}, timeout=30).json()
    assert ranked["total"] == len(ids)
    assert sorted(r["isotherm_id"] for r in ranked["rows"]) == sorted(ids)
    latest = s.get(f"{api}/rankings", params={"batch_id": batch_id, "limit": 10_000},
                   timeout=30).json()
    assert latest["total"] == len(ids)  # one sorbent per isotherm: nothing deduplicated away


def start_redis_on(port: int, log_dir, registry: list[Proc], name: str) -> Proc:
    """A redis-server without persistence on a given loopback port (restart = new process)."""
    binary = shutil.which("redis-server") or "/usr/bin/redis-server"
    proc = start(name, [binary, "--port", str(port), "--bind", LOOPBACK, "--save", "",
                        "--appendonly", "no", "--dir", str(log_dir)], clean_env(), log_dir,
                 registry)

    def pong():
        import redis

        try:
            return redis.Redis(host=LOOPBACK, port=port, socket_timeout=1).ping()
        except redis.RedisError:
            return False

    wait_until(pong, f"{name} to answer PING", [proc])
    return proc


def base_env(tmp_path, **extra) -> dict[str, str]:
    settings = {"SORBRANK_DATA_DIR": str(tmp_path / "data"), "SORBRANK_CHUNK_SIZE": "1",
                "SORBRANK_EMBEDDED_WORKERS": "1", "SORBRANK_TOKENS": tokens_json(),
                "PYTHONPATH": str(ROOT)}
    return clean_env(**{**settings, **extra})


# -- the faults ----------------------------------------------------------------------

def test_worker_sigkill_mid_batch_then_api_restart(tmp_path, processes):
    """SIGKILL the only Celery worker while it fits a chunk; a new worker finishes the
    batch with every isotherm once. Then SIGKILL the API: a new API process serves the
    same status and results."""
    logs = tmp_path / "logs"
    port = free_port()
    start_redis_on(port, logs, processes, "redis")
    env = base_env(tmp_path, SORBRANK_BROKER_URL=f"redis://{LOOPBACK}:{port}/0")
    worker = start_worker(env, logs, processes, name="worker-1")
    server, url = start_server(env, logs, processes, name="server-1")
    api, s = url + "/api/v1", session()

    body, ids = batch_csv("WK", 24)
    batch_id = submit(s, api, body)
    wait_mid_way(env["SORBRANK_DATA_DIR"], batch_id, [worker, server])
    kill_group(worker)
    after_kill = chunk_states(env["SORBRANK_DATA_DIR"], batch_id)
    assert sum(state in SETTLED for state in after_kill) < len(after_kill)  # truly mid-way

    replacement = start_worker(env, logs, processes, name="worker-2")
    wait_final(s, api, batch_id, [replacement, server])
    assert_exactly_once(s, api, batch_id, ids)

    before = {path: s.get(api + path, timeout=30).json() for path in (
        f"/batches/{batch_id}", f"/batches/{batch_id}/results", "/batches")}
    kill_group(server)
    _, url2 = start_server(env, logs, processes, name="server-2")
    api2 = url2 + "/api/v1"
    for path, doc in before.items():
        resp = s.get(api2 + path, timeout=30)
        assert resp.status_code == 200 and resp.json() == doc, path
    assert_exactly_once(s, api2, batch_id, ids)


def test_redis_restart_mid_batch_loses_nothing(tmp_path, processes):
    """redis-server (no persistence) crashes mid-batch and forgets every queued chunk; a
    batch posted while it is down is still accepted. Redis comes back on the same port,
    the worker is restarted (its start reconciles from the store): both batches complete,
    every isotherm once."""
    logs = tmp_path / "logs"
    port = free_port()
    redis_1 = start_redis_on(port, logs, processes, "redis-1")
    env = base_env(tmp_path, SORBRANK_BROKER_URL=f"redis://{LOOPBACK}:{port}/0")
    worker = start_worker(env, logs, processes, name="worker-1")
    server, url = start_server(env, logs, processes, name="server")
    api, s = url + "/api/v1", session()

    body, ids = batch_csv("RA", 24)
    batch_a = submit(s, api, body)
    wait_mid_way(env["SORBRANK_DATA_DIR"], batch_a, [worker, server])
    kill_group(redis_1)
    assert sum(st in SETTLED for st in chunk_states(env["SORBRANK_DATA_DIR"], batch_a)) < len(ids)

    # the broker is gone: the API still takes the batch (it is on disk before the 202)
    body_b, ids_b = batch_csv("RB", 3)
    batch_b = submit(s, api, body_b)
    assert s.get(f"{api}/batches/{batch_b}", timeout=10).json()["state"] == "queued"
    assert s.get(f"{url}/readyz", timeout=30).status_code == 503

    start_redis_on(port, logs, processes, "redis-2")
    wait_until(lambda: s.get(f"{url}/readyz", timeout=30).status_code == 200,
               "the API to see the new redis", [server])
    # the realistic recovery: the worker is restarted (as a process manager does), and
    # its start re-enqueues what the store says is unfinished
    worker.stop()
    new_worker = start_worker(env, logs, processes, name="worker-2")
    for batch_id, expected in ((batch_a, ids), (batch_b, ids_b)):
        wait_final(s, api, batch_id, [new_worker, server])
        assert_exactly_once(s, api, batch_id, expected)
    assert "reconcile: re-enqueued" in new_worker.log_text()


def test_embedded_server_sigkill_mid_batch_resumes(tmp_path, processes):
    """SIGKILL the embedded server (and its fitting pool) mid-batch; started again on
    the same store it resumes, and every isotherm is there once. A crashed writer's
    leftovers (a dot-temp file, a truncated file) never show in results or rankings."""
    logs = tmp_path / "logs"
    env = base_env(tmp_path)
    server, url = start_server(env, logs, processes, name="embedded-1")
    s = session()
    body, ids = batch_csv("EM", 24)
    batch_id = submit(s, url + "/api/v1", body)
    wait_mid_way(env["SORBRANK_DATA_DIR"], batch_id, [server])
    kill_group(server)
    assert sum(st in SETTLED for st in chunk_states(env["SORBRANK_DATA_DIR"], batch_id)) < len(ids)

    server_2, url = start_server(env, logs, processes, name="embedded-2")
    api = url + "/api/v1"
    wait_final(s, api, batch_id, [server_2])
    assert_exactly_once(s, api, batch_id, ids)
    assert "resumed" in server_2.log_text()

    # what a writer killed between write and rename leaves behind, in every table
    store = Store(env["SORBRANK_DATA_DIR"])
    for table in ("summaries", "fits", "inputs"):
        good = store.table_path(table, batch_id, 0).read_bytes()
        partition = store.table_path(table, batch_id, 0).parent
        (partition / ".chunk-00000.parquet.crash1.tmp").write_bytes(good[: len(good) // 2])
        (partition / ".chunk-00000.parquet.crash2.tmp").write_bytes(good)  # complete, not renamed
        # a truncated file under a final name (a damaged disk): skipped, hides nothing
        (partition / "chunk-09999.parquet").write_bytes(good[: len(good) // 3])
    (store.batch_dir(batch_id) / ".chunk-00000.json.crash.tmp").write_text('{"state": "runn')
    assert_exactly_once(s, api, batch_id, ids)
    for path in (f"/batches/{batch_id}/results?format=csv", "/rankings?format=parquet",
                 "/sorbents/EM-M000", "/batches"):
        assert s.get(api + path, timeout=30).status_code == 200, path


def test_redis_restart_with_surviving_worker_is_reconciled_by_the_watch(tmp_path, processes):
    """Redis (no persistence) dies mid-batch and comes back empty while the Celery worker
    lives on and reconnects. No process restarts, so no start-up reconcile runs: the
    worker's periodic broker watch sees pending chunks the broker no longer holds and
    re-enqueues them. The batch completes, every isotherm once."""
    logs = tmp_path / "logs"
    port = free_port()
    redis_1 = start_redis_on(port, logs, processes, "redis-1")
    env = base_env(tmp_path, SORBRANK_BROKER_URL=f"redis://{LOOPBACK}:{port}/0",
                   SORBRANK_RECONCILE_INTERVAL_S="1")
    worker = start_worker(env, logs, processes, name="worker")
    server, url = start_server(env, logs, processes, name="server")
    api, s = url + "/api/v1", session()

    body, ids = batch_csv("RW", 24)
    batch_id = submit(s, api, body)
    wait_mid_way(env["SORBRANK_DATA_DIR"], batch_id, [worker, server])
    kill_group(redis_1)
    start_redis_on(port, logs, processes, "redis-2")

    wait_final(s, api, batch_id, [worker, server])
    assert_exactly_once(s, api, batch_id, ids)
    assert worker.alive()  # recovered without a restart
    assert "re-enqueueing" in worker.log_text()


# -- processes as /proc shows them (psutil is not a dependency) ---------------------

def _stat_fields(pid: int) -> list[str] | None:
    """/proc/<pid>/stat after the command name: [state, ppid, ...]; None if gone."""
    try:
        text = open(f"/proc/{pid}/stat").read()
    except (FileNotFoundError, ProcessLookupError):
        return None
    return text[text.rindex(")") + 2:].split()  # the name may hold spaces and parentheses


def descendant_pids(root_pid: int) -> set[int]:
    """Every living process below ``root_pid`` (children, grandchildren...)."""
    parent_of = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit() and (fields := _stat_fields(int(entry))) and fields[0] != "Z":
            parent_of[int(entry)] = int(fields[1])
    found, frontier = set(), {root_pid}
    while frontier:
        frontier = {pid for pid, ppid in parent_of.items() if ppid in frontier} - found
        found |= frontier
    return found


def living(pids: set[int]) -> set[int]:
    """The ``pids`` still running: a zombie has exited (an orphan's reaper may be slow)."""
    return {pid for pid in pids if (fields := _stat_fields(pid)) and fields[0] != "Z"}


def test_embedded_pool_exits_when_the_server_is_sigkilled(tmp_path, processes):
    """SIGKILL only the embedded server process (not its group, as an OOM killer or a
    `kill -9 <pid>` does) while its pool fits: every pool process exits within seconds
    instead of living on, orphaned, with its memory."""
    logs = tmp_path / "logs"
    env = base_env(tmp_path, SORBRANK_EMBEDDED_WORKERS="2")
    server, url = start_server(env, logs, processes, name="embedded")
    body, _ = batch_csv("PD", 40)
    batch_id = submit(session(), url + "/api/v1", body)
    wait_mid_way(env["SORBRANK_DATA_DIR"], batch_id, [server])
    pool = wait_until(lambda: (d := descendant_pids(server.popen.pid)) and len(d) >= 2 and d,
                      "the pool processes to be running", [server])
    os.kill(server.popen.pid, signal.SIGKILL)
    server.popen.wait(timeout=30)
    wait_until(lambda: not living(pool), f"pool processes {sorted(living(pool))} to exit",
               timeout_s=10, interval_s=0.1)
