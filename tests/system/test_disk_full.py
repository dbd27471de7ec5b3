"""A full store, with real processes on a real full filesystem.

Approach: a 2 MiB tmpfs mounted as the store of a real ``sorbrank serve``
(embedded) or of a real Celery worker + redis-server + ``sorbrank serve``
(distributed), filled with a ballast file until writes fail with ENOSPC.
Needs root (mount); skipped with the reason otherwise.

Checked: a POST answers 507 with a problem document and leaves no input files
behind (the sorbent views do not list its sorbents); /readyz answers 503 while
free space is below SORBRANK_MIN_FREE_BYTES; a chunk that hits ENOSPC is not
settled as failed but waits, and once the ballast is removed the accepted
batches complete without a restart.
"""
from __future__ import annotations

import errno
import os
import signal
import subprocess

import pytest
import requests

from conftest import (ROOT, TOKENS, clean_env, csv_batch, isotherm, start_redis, start_server,
                      start_worker, tokens_json, wait_until)
from test_faults import descendant_pids

pytestmark = pytest.mark.integration

MIN_FREE_BYTES = 256 * 1024


@pytest.fixture
def tmpfs(tmp_path):
    if os.geteuid() != 0:
        pytest.skip("mounting a tmpfs for the full-disk test needs root")
    mount_point = tmp_path / "store"
    mount_point.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=2m", "tmpfs", str(mount_point)],
                          capture_output=True, text=True)
    if done.returncode != 0:
        pytest.skip(f"mount -t tmpfs is not permitted here: {done.stderr.strip()}")
    try:
        yield mount_point
    finally:
        subprocess.run(["umount", "-l", str(mount_point)], check=False)


def fill(mount_point, leave_bytes: int = 0):
    """Write a ballast file until ENOSPC, then cut it so ``leave_bytes`` stay free."""
    ballast = mount_point / "ballast"
    block = b"\0" * 65536
    with open(ballast, "wb") as fh:
        try:
            while True:
                fh.write(block)
                fh.flush()
        except OSError as exc:
            assert exc.errno == errno.ENOSPC
    if leave_bytes:
        os.truncate(ballast, max(os.path.getsize(ballast) - leave_bytes, 0))
    return ballast


def session() -> requests.Session:
    s = requests.Session()
    s.headers["Authorization"] = f"Bearer {TOKENS['submitter'][0]}"
    return s


def batch(prefix: str, n: int) -> bytes:
    return csv_batch([isotherm(f"{prefix}-S{i:02d}", 1.0 + 0.2 * i, 0.05) for i in range(n)])


def post(s, api: str, body: bytes) -> requests.Response:
    return s.post(f"{api}/batches", data=body, headers={"Content-Type": "text/csv"}, timeout=60)


def wait_state(s, api: str, batch_id: str, procs, states=("done",), timeout_s: float = 120):
    def settled():
        doc = s.get(f"{api}/batches/{batch_id}", timeout=10).json()
        return doc if doc["state"] in ("done", "failed", "partial") else None
    doc = wait_until(settled, f"batch {batch_id} to settle", procs, timeout_s=timeout_s)
    assert doc["state"] in states, doc
    return doc


def orphan_inputs(store) -> list[str]:
    inputs = store / "inputs"
    if not inputs.exists():
        return []
    return [d.name for d in inputs.iterdir()
            if not (store / "batches" / d.name.removeprefix("batch_id=") / "manifest.json").exists()]


def freeze(pids) -> None:
    for pid in pids:
        os.kill(pid, signal.SIGSTOP)


def thaw(pids) -> None:
    for pid in pids:
        os.kill(pid, signal.SIGCONT)


@pytest.mark.parametrize("mode", ["embedded", "distributed"])
def test_full_store_refuses_new_work_and_finishes_accepted_work(mode, tmpfs, tmp_path, processes):
    logs = tmp_path / "logs"
    env = clean_env(SORBRANK_DATA_DIR=str(tmpfs), SORBRANK_CHUNK_SIZE="1",
                    SORBRANK_EMBEDDED_WORKERS="1", SORBRANK_TOKENS=tokens_json(),
                    SORBRANK_MIN_FREE_BYTES=str(MIN_FREE_BYTES),
                    SORBRANK_RECONCILE_INTERVAL_S="1", PYTHONPATH=str(ROOT))
    workers = []
    if mode == "distributed":
        _, env["SORBRANK_BROKER_URL"] = start_redis(logs, processes)
        worker = start_worker(env, logs, processes)
        workers = [worker]
    server, url = start_server(env, logs, processes)
    api, s, procs = url + "/api/v1", session(), [server, *workers]

    # a warm-up batch starts the fitting processes (the embedded pool spawns on demand)
    warm = post(s, api, batch("WARM", 1))
    assert warm.status_code == 202, warm.text
    wait_state(s, api, warm.json()["batch_id"], procs)
    assert requests.get(url + "/readyz", timeout=10).status_code == 200

    # freeze the fitting processes, accept a batch, then fill the disk under it
    fitters = descendant_pids((workers[0] if workers else server).popen.pid)
    if mode == "distributed":
        fitters.add(workers[0].popen.pid)
    assert fitters
    freeze(fitters)
    try:
        accepted = post(s, api, batch("ACC", 3))
        assert accepted.status_code == 202, accepted.text
        accepted_id = accepted.json()["batch_id"]
        ballast = fill(tmpfs)
    finally:
        thaw(fitters)

    # the chunks hit ENOSPC: they wait, never settle as failed
    wait_until(lambda: "store full" in "".join(p.log_text() for p in procs),
               "a log line saying a chunk waits for space", procs, timeout_s=60)
    doc = s.get(f"{api}/batches/{accepted_id}", timeout=10).json()
    assert doc["state"] in ("queued", "running"), doc
    assert doc["chunks"]["failed"] == 0, doc

    # new work is refused with 507 and a problem document, readiness says why
    refused = post(s, api, batch("FULL", 4))
    assert refused.status_code == 507, refused.text
    assert refused.headers["Content-Type"].startswith("application/problem+json")
    problem = refused.json()
    assert problem["status"] == 507 and "insufficient-storage" in problem["type"], problem
    ready = requests.get(url + "/readyz", timeout=10)
    assert ready.status_code == 503, ready.text
    assert "free" in ready.json()["detail"], ready.text
    assert str(tmpfs) not in ready.text  # unauthenticated: no store path

    # free space just above the threshold but less than the batch needs: the
    # write fails half-way, 507 too, and the input files it wrote are removed
    # (the sorbent views never list its sorbents)
    os.truncate(ballast, os.path.getsize(ballast) - MIN_FREE_BYTES - 16 * 1024)
    half = post(s, api, batch("HALF", 100))
    assert half.status_code == 507, half.text
    assert "the store is full" in half.json()["detail"], half.text  # failed writing, not refused first
    assert orphan_inputs(tmpfs) == []
    for sorbent in ("HALF-S00", "FULL-S00"):
        missing = s.get(f"{api}/sorbents/{sorbent}", timeout=10)
        assert missing.status_code == 404, missing.text
    overview = s.get(url + "/", timeout=10)
    assert overview.status_code == 200 and "HALF-" not in overview.text

    # space returns: the accepted batch completes, every chunk done, no restart
    ballast.unlink()
    doc = wait_state(s, api, accepted_id, procs)
    assert doc["counts"] == {"accepted": 3, "done": 3, "failed": 0, "rejected": 0}, doc
    assert requests.get(url + "/readyz", timeout=10).status_code == 200
    again = post(s, api, batch("AFTER", 2))
    assert again.status_code == 202, again.text
    wait_state(s, api, again.json()["batch_id"], procs)


def test_read_only_store_answers_503_and_keeps_serving_reads(tmpfs, tmp_path, processes):
    """The tmpfs remounted read-only under a running embedded server: a POST is a
    503 problem (never a 500), readiness says not ready, reads answer 200; once
    writable again, a POST is accepted and fitted."""
    env = clean_env(SORBRANK_DATA_DIR=str(tmpfs), SORBRANK_CHUNK_SIZE="2",
                    SORBRANK_EMBEDDED_WORKERS="1", SORBRANK_TOKENS=tokens_json(),
                    SORBRANK_MIN_FREE_BYTES=str(MIN_FREE_BYTES),
                    SORBRANK_RECONCILE_INTERVAL_S="1", PYTHONPATH=str(ROOT))
    server, url = start_server(env, tmp_path / "logs", processes)
    api, s = url + "/api/v1", session()
    first = post(s, api, batch("RO", 2))
    assert first.status_code == 202, first.text
    first_id = first.json()["batch_id"]
    wait_state(s, api, first_id, [server])

    subprocess.run(["mount", "-o", "remount,ro", str(tmpfs)], check=True)
    try:
        refused = post(s, api, batch("ROX", 2))
        assert refused.status_code == 503, refused.text
        assert refused.headers["Content-Type"].startswith("application/problem+json")
        assert "store-read-only" in refused.json()["type"] and refused.headers["Retry-After"]
        assert requests.get(url + "/readyz", timeout=10).status_code == 503
        for path in (f"{api}/batches/{first_id}", f"{api}/batches/{first_id}/results",
                     f"{api}/rankings", f"{api}/sorbents/RO-S00", url + "/"):
            assert s.get(path, timeout=30).status_code == 200, path
    finally:
        subprocess.run(["mount", "-o", "remount,rw", str(tmpfs)], check=True)
    again = post(s, api, batch("RW", 2))
    assert again.status_code == 202, again.text
    wait_state(s, api, again.json()["batch_id"], [server])
