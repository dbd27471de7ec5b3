"""End to end over HTTP against real processes.

Every test runs twice through the ``service`` fixture: against an embedded
``sorbrank serve``, and against ``sorbrank serve`` + a Celery worker + a
redis-server (distributed). Batches are small; waits are bounded polls.
"""
from __future__ import annotations

import io
import json
import uuid

import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.parquet as pq
import pytest

from conftest import (
    MAX_UPLOAD_BYTES, csv_batch, isotherm, json_batch, parquet_batch, start_server,
    start_worker, wait_until,
)

pytestmark = pytest.mark.integration

MEDIA = {"csv": "text/csv", "json": "application/json",
         "parquet": "application/vnd.apache.parquet"}
FINAL_STATES = ("done", "failed", "partial")


def post(session, service, body: bytes, fmt: str, key: str | None = None, **params):
    headers = {"Content-Type": MEDIA[fmt]}
    if key:
        headers["Idempotency-Key"] = key
    return session.post(f"{service.api}/batches", data=body, headers=headers, params=params,
                        timeout=30)


def wait_done(session, service, batch_id: str) -> dict:
    def settled():
        status = session.get(f"{service.api}/batches/{batch_id}", timeout=10).json()
        return status if status["state"] in FINAL_STATES else None

    return wait_until(settled, f"batch {batch_id} to finish", [p for p in service.procs],
                      timeout_s=180, interval_s=0.2)


def read_table(resp, fmt: str) -> pa.Table:
    if fmt == "parquet":
        return pq.read_table(io.BytesIO(resp.content))
    if fmt == "arrow":
        return pa.ipc.open_stream(resp.content).read_all()
    return pcsv.read_csv(io.BytesIO(resp.content))


def test_batches_in_three_formats_results_and_rankings(service):
    s = service.session("submitter")
    csv_body = csv_batch([isotherm("A1", 3.0, 0.10, 273.15), isotherm("A1", 2.5, 0.05),
                          isotherm("A2", 4.0, 0.02)],
                         extra_lines=("A9,CO2,298.15,10,not-a-number",))
    json_body = json_batch([isotherm("A1", 3.4, 0.04), isotherm("A3", 1.5, 0.3)])
    parquet_body = parquet_batch([isotherm("A2", 4.4, 0.03), isotherm("A4", 6.0, 0.01, 273.15)])

    accepted = []
    for body, fmt, n in ((csv_body, "csv", 3), (json_body, "json", 2), (parquet_body, "parquet", 2)):
        resp = post(s, service, body, fmt, batch_label=f"it-{fmt}-{uuid.uuid4().hex[:6]}")
        assert resp.status_code == 202, resp.text
        reply = resp.json()
        assert reply["accepted"] == n
        assert reply["status_url"] == f"/api/v1/batches/{reply['batch_id']}"
        assert resp.headers["Location"] == reply["status_url"]
        accepted.append(reply)
    # the bad CSV row is named precisely and did not stop the good isotherms
    (issue,) = accepted[0]["rejected"]
    assert issue["row"] == 28 and issue["field"] == "loading_mol_per_kg" and issue["code"] == "not_a_number"
    assert issue["isotherm"].startswith("A9")

    for reply in accepted:
        status = wait_done(s, service, reply["batch_id"])
        assert status["state"] == "done", status
        assert status["progress"] == 1.0
        assert status["counts"]["done"] == status["counts"]["accepted"] == reply["accepted"]
        assert status["counts"]["failed"] == 0
        t = status["timings"]
        assert t["accepted_at"] <= t["started_at"] <= t["finished_at"]
        assert status["chunks"]["done"] == status["chunks"]["total"] >= 1
    assert s.get(f"{service.api}/batches/{accepted[0]['batch_id']}").json()["counts"]["rejected"] == 1

    # results: the same rows in every format
    batch_id = accepted[0]["batch_id"]
    doc = s.get(f"{service.api}/batches/{batch_id}/results").json()
    ids = sorted(r["isotherm_id"] for r in doc["summary"])
    q_sat = {r["isotherm_id"]: r["q_sat_mol_per_kg"] for r in doc["summary"]}
    assert len(ids) == 3 and {r["sorbent_id"] for r in doc["summary"]} == {"A1", "A2"}
    assert len(doc["fits"]) == 3 * len({r["model"] for r in doc["fits"]})
    assert abs(q_sat[next(i for i in ids if i.startswith("A2"))] - 4.0) < 0.01
    for fmt in ("csv", "parquet", "arrow"):
        resp = s.get(f"{service.api}/batches/{batch_id}/results", params={"format": fmt})
        assert resp.status_code == 200, resp.text
        table = read_table(resp, fmt)
        assert sorted(table["isotherm_id"].to_pylist()) == ids
        assert dict(zip(table["isotherm_id"].to_pylist(),
                        table["q_sat_mol_per_kg"].to_pylist())) == q_sat
    fits = read_table(s.get(f"{service.api}/batches/{batch_id}/results",
                            params={"format": "arrow", "table": "fits"}), "arrow")
    assert fits.num_rows == len(doc["fits"])
    by_accept = s.get(f"{service.api}/batches/{batch_id}/results",
                      headers={"Accept": "application/vnd.apache.parquet"})
    assert by_accept.headers["Content-Type"] == "application/vnd.apache.parquet"

    check_rankings_against_brute_force(s, service)

    sorbent = s.get(f"{service.api}/sorbents/A1").json()
    assert {accepted[0]["batch_id"], accepted[1]["batch_id"]} <= set(sorbent["batches"])
    assert len(sorbent["summaries"]) >= 3 and sorbent["isotherms"][0]["pressure_pa"]


def check_rankings_against_brute_force(s, service):
    """Recompute latest-wins rankings from every batch's results, compare."""
    batches = s.get(f"{service.api}/batches", params={"limit": 1000}).json()["batches"]
    rows = []
    for b in batches:
        if b["state"] == "done":
            rows += s.get(f"{service.api}/batches/{b['batch_id']}/results",
                          params={"table": "summary"}).json()["summary"]
    newest = sorted(rows, key=lambda r: r["isotherm_id"])
    newest.sort(key=lambda r: (r["accepted_at"], r["batch_id"]), reverse=True)
    winners = {}
    for r in newest:
        winners.setdefault((r["sorbent_id"], r["adsorbate"], r["branch"],
                            round(r["temperature_k"])), r)
    ranked = sorted((r for r in winners.values() if r["q_sat_mol_per_kg"] is not None),
                    key=lambda r: (-r["q_sat_mol_per_kg"], r["sorbent_id"], r["isotherm_id"]))
    expected = [(r["batch_id"], r["isotherm_id"]) for r in ranked]

    # by q_sat, every row in place: the latest-wins rule is what this checks (the default
    # sort and its unreliable-last order are tested in test_store.py and test_api.py)
    by_q_sat = {"sort": "q_sat_mol_per_kg", "unreliable_last": "false"}
    doc = s.get(f"{service.api}/rankings", params={"limit": 1000, **by_q_sat}).json()
    assert doc["total"] == len(winners)
    got = [(r["batch_id"], r["isotherm_id"]) for r in doc["rows"]]
    assert got[:len(expected)] == expected
    assert "accepted last wins" in doc["deduplication"]
    for fmt in ("csv", "parquet", "arrow"):
        resp = s.get(f"{service.api}/rankings", params={"limit": 1000, "format": fmt, **by_q_sat})
        table = read_table(resp, fmt)
        assert list(zip(table["batch_id"].to_pylist(), table["isotherm_id"].to_pylist())) == got
        assert resp.headers["X-Total-Count"] == str(len(winners))
    everything = s.get(f"{service.api}/rankings", params={"all": "true", "limit": 1000}).json()
    assert everything["total"] == len(rows)
    at_273 = s.get(f"{service.api}/rankings", params={"temperature_k": 273.0,
                                                      "temperature_tolerance_k": 0.5}).json()
    assert {r["temperature_k"] for r in at_273["rows"]} <= {273.15}
    assert at_273["total"] == sum(1 for k in winners if k[3] == 273)


def test_retried_post_with_idempotency_key_gives_one_batch(service):
    s = service.session("submitter")
    body = csv_batch([isotherm("K1", 2.0, 0.1)])
    key = f"retry-{uuid.uuid4()}"
    before = s.get(f"{service.api}/batches").json()["total"]
    first = post(s, service, body, "csv", key=key)
    second = post(s, service, body, "csv", key=key)
    assert first.status_code == second.status_code == 202
    assert first.json() == second.json()
    assert s.get(f"{service.api}/batches").json()["total"] == before + 1
    reused = post(s, service, csv_batch([isotherm("K2", 2.0, 0.1)]), "csv", key=key)
    assert reused.status_code == 422
    assert reused.json()["batch_id"] == first.json()["batch_id"]
    wait_done(s, service, first.json()["batch_id"])


def test_client_errors_are_problem_documents(service):
    s = service.session("submitter")

    def problem(resp, status):
        assert resp.status_code == status, resp.text
        assert resp.headers["Content-Type"] == "application/problem+json"
        doc = resp.json()
        assert doc["status"] == status and doc["title"]
        return doc

    problem(s.get(f"{service.api}/batches/b-20000101-000000-000000-00000000"), 404)
    problem(s.get(f"{service.api}/batches/..%2F..%2Fetc"), 404)

    nothing_good = csv_batch([], extra_lines=("Z1,CO2,298.15,10,oops",
                                              "Z2,CO2,298.15,-5,1.0"))
    doc = problem(post(s, service, nothing_good, "csv"), 422)
    assert {(i["row"], i["field"]) for i in doc["issues"]} >= {(1, "loading_mol_per_kg"), (2, "pressure_kpa")}

    too_big = csv_batch([isotherm("Big", 1.0, 0.1)]) + b"#" * MAX_UPLOAD_BYTES
    problem(post(s, service, too_big, "csv"), 413)

    anonymous = service.session("reader")
    anonymous.headers.pop("Authorization")
    resp = anonymous.get(f"{service.api}/rankings")
    problem(resp, 401)
    assert resp.headers["WWW-Authenticate"].startswith("Bearer")
    anonymous.headers["Authorization"] = "Bearer not-a-real-token"
    problem(anonymous.get(f"{service.api}/batches"), 401)
    doc = problem(post(service.session("reader"), service, csv_batch([isotherm("R", 1, 1)]), "csv"),
                  403)
    assert doc["required_scope"] == "submit"
    assert anonymous.get(f"{service.url}/healthz").status_code == 200
    assert anonymous.get(f"{service.url}/readyz").json()["mode"] == service.mode


def test_unfinished_batch_finishes_after_restart(service):
    """Work the store holds but no queue knows about (a lost Redis, a server
    stopped mid-batch) is picked up when a worker or the embedded server starts."""
    from sorbrank.worker import jobs
    from sorbrank.worker.intake import read_batch
    from sorbrank.worker.store import Store

    batch = read_batch(csv_batch([isotherm("R1", 2.0, 0.1), isotherm("R2", 3.0, 0.2),
                                  isotherm("R3", 1.0, 0.5)]), "csv", batch_label="restart")
    manifest = jobs.accept_batch(Store(service.data_dir), batch, options={}, chunk_size=2)
    s = service.session("admin")
    status_url = f"{service.api}/batches/{manifest['batch_id']}"
    assert s.get(status_url).json()["state"] == "queued"

    role = "celery-worker" if service.mode == "distributed" else "server"
    old = next(p for p in service.procs if p.name.startswith(role))
    old.stop()
    service.procs.remove(old)
    if service.mode == "distributed":
        start_worker(service.env, service.log_dir, service.procs, name="celery-worker-2")
    else:
        _, service.url = start_server(service.env, service.log_dir, service.procs, name="server-2")
        status_url = f"{service.api}/batches/{manifest['batch_id']}"
    status = wait_done(s, service, manifest["batch_id"])
    assert status["state"] == "done" and status["counts"]["done"] == 3



def test_submit_and_rank_commands(service, tmp_path):
    import subprocess
    import sys

    from conftest import ROOT, TOKENS, clean_env

    batch_file = tmp_path / "cli-batch.csv"
    batch_file.write_bytes(csv_batch([isotherm("CLI1", 7.5, 0.1), isotherm("CLI2", 0.5, 0.1)]))
    env = clean_env(PYTHONPATH=str(ROOT))
    cli = [sys.executable, "-m", "sorbrank.service.cli"]
    done = subprocess.run(cli + ["submit", str(batch_file), "--url", service.url, "--token",
                                 TOKENS["submitter"][0], "--wait", "--timeout-s", "150"],
                          env=env, capture_output=True, text=True, timeout=200)
    assert done.returncode == 0, done.stderr
    batch_id = done.stdout.split()[0]
    assert f"{batch_id}\tdone\tdone 2\tfailed 0" in done.stdout
    assert "100.0%" in done.stderr  # the progress bar went to stderr

    refused = subprocess.run(cli + ["submit", str(batch_file), "--url", service.url, "--token",
                                    TOKENS["reader"][0]], env=env, capture_output=True, text=True,
                             timeout=60)
    assert refused.returncode == 1 and "HTTP 403" in refused.stderr

    ranked = subprocess.run(cli + ["rank", "--url", service.url, "--token", TOKENS["reader"][0],
                                   "--adsorbate", "CO2", "--limit", "1000", "--format", "json"],
                            env=env, capture_output=True, text=True, timeout=60)
    assert ranked.returncode == 0, ranked.stderr
    rows = {r["sorbent_id"]: r for r in json.loads(ranked.stdout)["rows"]}
    assert abs(rows["CLI1"]["q_sat_mol_per_kg"] - 7.5) < 0.01
    table = subprocess.run(cli + ["rank", "--url", service.url, "--token", TOKENS["reader"][0],
                                  "--sort", "q_sat_mol_per_kg", "--order", "asc", "--limit", "1000"],
                           env=env, capture_output=True, text=True, timeout=60)
    lines = table.stdout.splitlines()
    assert lines[0].split()[:2] == ["rank", "sorbent_id"]
    names = [line.split()[1] for line in lines[2:]]
    assert names.index("CLI2") < names.index("CLI1")


def test_demo_command_runs_the_round_trip(tmp_path, processes):
    import sys

    from conftest import ROOT, clean_env, start

    batches = tmp_path / "batches"
    batches.mkdir()
    (batches / "a.csv").write_bytes(csv_batch([isotherm("DM1", 4.0, 0.1), isotherm("DM2", 2.0, 0.1)]))
    (batches / "b.json").write_bytes(json_batch([isotherm("DM3", 3.0, 0.1)]))
    (batches / "ground_truth.json").write_text("{}")  # not a batch: would be refused
    (batches / "_scratch.csv").write_text("not a batch either")
    demo = start("demo", [sys.executable, "-m", "sorbrank.service.cli", "demo", "--batches", str(batches),
                          "--data-dir", str(tmp_path / "store"), "--top", "5"],
                 clean_env(SORBRANK_EMBEDDED_WORKERS="1", PYTHONPATH=str(ROOT)),
                 tmp_path / "logs", processes)
    wait_until(lambda: not demo.alive(), "the demo to finish", timeout_s=240, interval_s=0.2)
    output = demo.log_text()
    assert demo.popen.returncode == 0, output
    assert "ground_truth" not in output and "_scratch" not in output
    ranked = [line.split()[1] for line in output.splitlines() if line.strip()[:1].isdigit()
              and "DM" in line]
    assert ranked == ["DM1", "DM3", "DM2"]
    assert "CO2 at 298.15 K" in output
    from sorbrank.worker.store import Store

    assert len(Store(tmp_path / "store").batch_ids()) == 2
