"""The service under hostile load, over HTTP to a real ``sorbrank serve``:
slow connections, large JSON bodies, concurrent intakes, what the open probes
reveal, response headers, store file modes, and a submit-only token following
its own batch. Figures (latencies, peak memory) are printed, never asserted
tighter than the functional bound the issue sets."""
from __future__ import annotations

import hashlib
import json
import os
import socket
import stat
import subprocess
import sys
import threading
import time

import pytest
import requests

from conftest import (LOOPBACK, ROOT, TOKENS, clean_env, isotherm, json_batch, start_server,
                      tokens_json, wait_until)

pytestmark = pytest.mark.integration

# a token that may only submit (no read scope), and a second one like it
SUBMIT_ONLY = {"lab-rig": "t-rig-5b1e", "other-rig": "t-rig-c470"}


def submit_only_tokens_json() -> str:
    entries = json.loads(tokens_json())
    entries += [{"name": name, "sha256": hashlib.sha256(secret.encode()).hexdigest(),
                 "scopes": ["submit"]} for name, secret in SUBMIT_ONLY.items()]
    return json.dumps(entries)


def serve(tmp_path, processes, name="server", **settings):
    env = clean_env(SORBRANK_DATA_DIR=str(tmp_path / "data"), SORBRANK_EMBEDDED_WORKERS="1",
                    SORBRANK_TOKENS=submit_only_tokens_json(), PYTHONPATH=str(ROOT), **settings)
    proc, url = start_server(env, tmp_path / "logs", processes, name=name)
    return proc, url, env


def bearer(secret: str) -> dict:
    return {"Authorization": f"Bearer {secret}"}


def vm_hwm_mb(pid: int) -> float:
    """Peak resident memory of ``pid`` (VmHWM in /proc/<pid>/status), MB."""
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    raise AssertionError("no VmHWM line")


def points_json(target_bytes: int) -> bytes:
    """A valid JSON batch of 2,000-point isotherms (invented Tideglass-31 sorbents),
    about ``target_bytes`` long: the shape that costs intake most per byte."""
    pressures = [round(1 + i * 0.5, 3) for i in range(2000)]
    loadings = [round(2.0 * 0.05 * p / (1 + 0.05 * p), 6) for p in pressures]
    one = {"sorbent_id": "TG31-S0000", "adsorbate": "CO2", "temperature_k": 298.15,
           "pressure": pressures, "loading": loadings}
    count = max(1, target_bytes // len(json.dumps(one)))
    return json_batch([dict(one, sorbent_id=f"TG31-S{i:05d}") for i in range(count)])


# -- item 9: slow connections ----------------------------------------------------------

def test_slow_connections_neither_block_a_normal_request_nor_stay_open(tmp_path, processes):
    """20 connections each sending a partial request a byte at a time: a normal
    request is still answered within 1 s, and once they stall they are dropped
    after the read timeout (SORBRANK_HTTP_TIMEOUT_S)."""
    timeout_s = 3
    proc, url, _ = serve(tmp_path, processes, SORBRANK_HTTP_TIMEOUT_S=str(timeout_s))
    port = int(url.rsplit(":", 1)[1])
    head = (f"POST /api/v1/batches HTTP/1.1\r\nHost: {LOOPBACK}\r\n"
            "Content-Type: text/csv\r\nX-Slow: ").encode()
    slow = []
    for _ in range(20):
        sock = socket.create_connection((LOOPBACK, port), timeout=5)
        sock.sendall(head[:20])
        slow.append(sock)
    latencies = []
    for step in range(20, len(head)):  # keep every slow connection trickling
        for sock in slow:
            sock.sendall(head[step:step + 1])
        if step % 5 == 0:
            started = time.perf_counter()
            answer = requests.get(url + "/healthz", timeout=10)
            latencies.append(time.perf_counter() - started)
            assert answer.status_code == 200
        time.sleep(0.1)
    print(f"\n/healthz with 20 slow connections open: max {max(latencies) * 1000:.0f} ms, "
          f"median {sorted(latencies)[len(latencies) // 2] * 1000:.0f} ms over {len(latencies)}")
    assert max(latencies) < 1.0, latencies

    # now they stall: each must be closed by the server, not held open
    stalled_at = time.monotonic()
    closed_after = []
    for sock in slow:
        sock.settimeout(max(0.1, stalled_at + 4 * timeout_s + 10 - time.monotonic()))
        try:
            data = sock.recv(65536)
            while data:  # an error answer may come before the close
                data = sock.recv(65536)
            closed_after.append(time.monotonic() - stalled_at)
        except ConnectionResetError:
            closed_after.append(time.monotonic() - stalled_at)
        except socket.timeout:
            pass
        finally:
            sock.close()
    print(f"stalled connections closed by the server: {len(closed_after)} of 20, "
          f"after {min(closed_after, default=0):.1f}-{max(closed_after, default=0):.1f} s "
          f"(read timeout {timeout_s} s)")
    assert len(closed_after) == 20
    assert proc.alive()


# -- item 7: memory and concurrency of intake -------------------------------------------

def test_a_large_json_body_keeps_the_service_memory_bounded(tmp_path, processes):
    proc, url, _ = serve(tmp_path, processes)
    pid = proc.popen.pid
    baseline_mb = vm_hwm_mb(pid)
    body = points_json(61_000_000)
    started = time.perf_counter()
    answer = requests.post(url + "/api/v1/batches?models=langmuir", data=body,
                           headers={"Content-Type": "application/json",
                                    **bearer(TOKENS["submitter"][0])}, timeout=600)
    took_s = time.perf_counter() - started
    peak_mb = vm_hwm_mb(pid)
    print(f"\n{len(body) / 1e6:.0f} MB JSON body: HTTP {answer.status_code} after {took_s:.1f} s; "
          f"server VmHWM {baseline_mb:.0f} MB at start, {peak_mb:.0f} MB after")
    assert answer.status_code == 413, answer.text[:500]
    problem = answer.json()
    assert "JSON" in problem["detail"] and "Parquet" in problem["detail"]
    assert problem["max_bytes"] < len(body)
    assert peak_mb < 1500

    # the largest JSON body taken, twice at once: still bounded
    limit = problem["max_bytes"]
    near_limit = points_json(limit - 200_000)
    assert len(near_limit) <= limit
    answers = []

    def post():
        answers.append(requests.post(url + "/api/v1/batches?models=langmuir", data=near_limit,
                                     headers={"Content-Type": "application/json",
                                              **bearer(TOKENS["submitter"][0])}, timeout=600))
    threads = [threading.Thread(target=post) for _ in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    peak_mb = vm_hwm_mb(pid)
    print(f"two {len(near_limit) / 1e6:.1f} MB JSON bodies at once: "
          f"{sorted(a.status_code for a in answers)}; server VmHWM {peak_mb:.0f} MB")
    assert {a.status_code for a in answers} <= {202, 503}
    assert 202 in {a.status_code for a in answers}
    assert peak_mb < 1500


def test_intakes_beyond_the_bound_get_503_with_retry_after(tmp_path, processes):
    _, url, _ = serve(tmp_path, processes, SORBRANK_MAX_CONCURRENT_INTAKES="1")
    big = points_json(6_000_000)  # a second or more of intake
    small = json_batch([isotherm("TG31-S9001", 2.0, 0.1)])
    headers = {"Content-Type": "application/json", **bearer(TOKENS["submitter"][0])}
    first, busy = [], []

    def post_big():  # as a client would: again after a 503, until it is taken
        for _ in range(50):
            answer = requests.post(url + "/api/v1/batches?models=langmuir", data=big,
                                   headers=headers, timeout=300)
            if answer.status_code != 503:
                first.append(answer)
                return
            busy.append(answer)
            time.sleep(0.1)
    worker = threading.Thread(target=post_big)
    worker.start()
    while worker.is_alive():
        answer = requests.post(url + "/api/v1/batches", data=small, headers=headers, timeout=60)
        if answer.status_code == 503:
            busy.append(answer)
        else:
            assert answer.status_code == 202, answer.text[:300]
        time.sleep(0.05)
    worker.join()
    assert first and first[0].status_code == 202, first and first[0].text[:300]
    assert busy, "no request was refused while another intake ran"
    refused = busy[0]
    assert refused.headers["Content-Type"] == "application/problem+json"
    assert int(refused.headers["Retry-After"]) >= 1
    assert refused.json()["type"] == "urn:sorbrank:problem:busy"
    assert "SORBRANK_MAX_CONCURRENT_INTAKES" not in refused.text  # settings stay server-side
    # the slot is free again once the first intake is done
    again = requests.post(url + "/api/v1/batches", data=small, headers=headers, timeout=60)
    assert again.status_code == 202, again.text[:300]


# -- item 13: probes, headers, file modes, a submit-only token -------------------------

def test_readyz_does_not_reveal_the_store_path(tmp_path, processes):
    _, url, env = serve(tmp_path, processes)
    data_dir = env["SORBRANK_DATA_DIR"]
    assert requests.get(url + "/readyz", timeout=10).status_code == 200
    # the root turns into a plain file: the store cannot be written
    subprocess.run(["rm", "-rf", data_dir], check=True)
    with open(data_dir, "w") as fh:
        fh.write("not a store")
    answer = requests.get(url + "/readyz", timeout=10)
    assert answer.status_code == 503
    assert "not writable" in answer.json()["detail"]
    assert data_dir not in answer.text and str(tmp_path) not in answer.text


def test_json_and_svg_answers_say_nosniff(tmp_path, processes):
    _, url, _ = serve(tmp_path, processes)
    admin = bearer(TOKENS["admin"][0])
    accepted = requests.post(url + "/api/v1/batches?models=langmuir",
                             data=json_batch([isotherm("TG31-S0100", 2.0, 0.1)]),
                             headers={"Content-Type": "application/json", **admin}, timeout=60)
    assert accepted.status_code == 202
    batch_id = accepted.json()["batch_id"]
    wait_until(lambda: requests.get(f"{url}/api/v1/batches/{batch_id}", headers=admin,
                                    timeout=10).json()["state"] == "done", "the batch to finish")
    results = requests.get(f"{url}/api/v1/batches/{batch_id}/results", headers=admin, timeout=30)
    isotherm_id = results.json()["summary"][0]["isotherm_id"]
    answers = {
        "json": requests.get(url + "/api/v1/batches", headers=admin, timeout=10),
        "problem": requests.get(url + "/api/v1/batches/nosuch", headers=admin, timeout=10),
        "svg": requests.get(f"{url}/api/v1/isotherms/{isotherm_id}/plot",
                            params={"batch_id": batch_id, "format": "svg"}, headers=admin,
                            timeout=60),
        "probe": requests.get(url + "/healthz", timeout=10),
        "accepted": accepted,
    }
    assert "svg" in answers["svg"].headers["Content-Type"], answers["svg"].text[:300]
    for name, answer in answers.items():
        assert answer.headers.get("X-Content-Type-Options") == "nosniff", name


def store_modes(root) -> tuple[set[int], set[int]]:
    files, dirs = set(), set()
    for folder, subdirs, names in os.walk(root):
        dirs.update(stat.S_IMODE(os.stat(os.path.join(folder, d)).st_mode) for d in subdirs)
        files.update(stat.S_IMODE(os.stat(os.path.join(folder, n)).st_mode) for n in names)
    return files, dirs


def finished_store(tmp_path, processes, name, **settings) -> str:
    _, url, env = serve(tmp_path / name, processes, name=name, **settings)
    admin = bearer(TOKENS["admin"][0])
    accepted = requests.post(url + "/api/v1/batches?models=langmuir", headers={
        "Content-Type": "application/json", "Idempotency-Key": "k1", **admin},
        data=json_batch([isotherm("TG31-S0200", 2.0, 0.1)]), timeout=60)
    assert accepted.status_code == 202
    batch_id = accepted.json()["batch_id"]
    wait_until(lambda: requests.get(f"{url}/api/v1/batches/{batch_id}", headers=admin,
                                    timeout=10).json()["state"] == "done", "the batch to finish")
    return env["SORBRANK_DATA_DIR"]


def test_store_file_mode_is_a_setting_with_a_group_readable_default(tmp_path, processes):
    old_umask = os.umask(0o077)  # the server inherits it: the mode must not depend on it
    try:
        default_root = finished_store(tmp_path, processes, "default")
        shared_root = finished_store(tmp_path, processes, "shared", SORBRANK_FILE_MODE="0660")
    finally:
        os.umask(old_umask)
    files, dirs = store_modes(default_root)
    assert files == {0o640} and dirs == {0o750}, (sorted(map(oct, files)), sorted(map(oct, dirs)))
    files, dirs = store_modes(shared_root)
    assert files == {0o660} and dirs == {0o770}, (sorted(map(oct, files)), sorted(map(oct, dirs)))


def test_a_submit_only_token_follows_its_own_batch_and_no_other(tmp_path, processes):
    _, url, env = serve(tmp_path, processes)
    batch_file = tmp_path / "tideglass-31.json"
    batch_file.write_bytes(json_batch([isotherm("TG31-S0300", 2.0, 0.1)]))
    cli_env = dict(env, SORBRANK_TOKEN=SUBMIT_ONLY["lab-rig"], SORBRANK_URL=url)
    done = subprocess.run([sys.executable, "-m", "sorbrank.service.cli", "submit", str(batch_file),
                           "--models", "langmuir", "--wait", "--timeout-s", "120"],
                          env=cli_env, capture_output=True, text=True, timeout=180)
    assert done.returncode == 0, done.stdout + done.stderr
    batch_id = done.stdout.split()[0]
    assert f"{batch_id}\tdone" in done.stdout
    own = bearer(SUBMIT_ONLY["lab-rig"])
    assert requests.get(f"{url}/api/v1/batches/{batch_id}/results", headers=own,
                        timeout=30).status_code == 200
    other = bearer(SUBMIT_ONLY["other-rig"])
    refused = requests.get(f"{url}/api/v1/batches/{batch_id}", headers=other, timeout=10)
    assert refused.status_code == 403
    assert "read" in refused.json()["detail"]
    # reading across batches still needs the read scope
    assert requests.get(f"{url}/api/v1/batches", headers=own, timeout=10).status_code == 403
    assert requests.get(f"{url}/api/v1/batches/{batch_id}", headers=bearer(TOKENS["reader"][0]),
                        timeout=10).status_code == 200
