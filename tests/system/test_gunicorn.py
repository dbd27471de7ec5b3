"""The API under a real gunicorn with two worker processes, a real Celery worker
(``sorbrank worker``) and a real redis-server, all on loopback free ports.

One batch runs end to end once per module (``ran``); the tests then check
what it left: results and rankings, Prometheus metrics that moved (on the API
and on the worker's own metrics port, with the same values), and JSON log
lines that carry the batch id and never a token.
"""
from __future__ import annotations

import json
import re
import sys
from pathlib import Path

import pytest
import requests
from prometheus_client.parser import text_string_to_metric_families

from conftest import (LOOPBACK, ROOT, TOKENS, clean_env, csv_batch, free_port, http_ok, isotherm,
                      start, start_redis, start_worker, tokens_json, wait_until)

pytestmark = pytest.mark.integration

SORBENTS = ("GU-1", "GU-2", "GU-3")  # chunk size 2: two chunks
# gunicorn's own lifecycle lines ("[time] [pid] [INFO] Booting worker ...")
GUNICORN_OWN_LINE = re.compile(r"^\[[^\]]+\] \[\d+\] \[[A-Z]+\] ")


def scrape(url: str) -> dict[tuple[str, tuple], float]:
    """Every sample of a /metrics page: (name, sorted labels) -> value."""
    resp = requests.get(url, timeout=10)
    assert resp.status_code == 200, resp.text
    assert resp.headers["Content-Type"].startswith("text/plain")
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for family in text_string_to_metric_families(resp.text) for s in family.samples}


def value(samples: dict, name: str, **labels) -> float:
    return samples.get((name, tuple(sorted(labels.items()))), 0.0)


@pytest.fixture(scope="module")
def stack(tmp_path_factory):
    base = tmp_path_factory.mktemp("gunicorn")
    logs = base / "logs"
    procs = []
    try:
        _, redis_url = start_redis(logs, procs)
        env = clean_env(SORBRANK_DATA_DIR=str(base / "data"), SORBRANK_BROKER_URL=redis_url,
                        SORBRANK_TOKENS=tokens_json(), SORBRANK_CHUNK_SIZE="2",
                        SORBRANK_LOG_LEVEL="INFO", PYTHONPATH=str(ROOT))
        port = free_port()
        gunicorn = str(Path(sys.executable).with_name("gunicorn"))
        api = start("gunicorn", [gunicorn, "--bind", f"{LOOPBACK}:{port}", "--workers", "2",
                                 "sorbrank.service.wsgi:app"], env, logs, procs)
        url = f"http://{LOOPBACK}:{port}"
        wait_until(lambda: http_ok(url + "/healthz"), "gunicorn to answer /healthz", [api])
        metrics_port = free_port()
        worker = start_worker({**env, "SORBRANK_WORKER_METRICS_PORT": str(metrics_port),
                               "SORBRANK_WORKER_METRICS_HOST": LOOPBACK}, logs, procs)
        yield {"url": url, "api": api, "worker": worker, "procs": procs,
               "worker_metrics": f"http://{LOOPBACK}:{metrics_port}/metrics"}
    finally:
        for proc in reversed(procs):
            proc.stop()


@pytest.fixture(scope="module")
def ran(stack):
    """One batch posted, fitted by the Celery worker and read back."""
    session = requests.Session()
    session.headers["Authorization"] = f"Bearer {TOKENS['submitter'][0]}"
    api = stack["url"] + "/api/v1"
    before = scrape(stack["url"] + "/metrics")
    body = csv_batch([isotherm(m, 2.0 + k, 0.05) for k, m in enumerate(SORBENTS)])
    resp = session.post(f"{api}/batches", data=body, headers={"Content-Type": "text/csv"},
                        params={"models": "langmuir,sips"}, timeout=60)
    assert resp.status_code == 202, resp.text
    batch_id = resp.json()["batch_id"]

    def finished():
        state = session.get(f"{api}/batches/{batch_id}", timeout=10).json()["state"]
        return state if state in ("done", "failed", "partial") else None

    state = wait_until(finished, "the batch to finish", [stack["api"], stack["worker"]],
                       timeout_s=180, interval_s=0.3)
    results = session.get(f"{api}/batches/{batch_id}/results", timeout=30)
    rankings = session.get(f"{api}/rankings", params={"adsorbate": "CO2", "all": "true"},
                           timeout=30)
    # several scrapes: gunicorn hands them to either of its two processes
    after = [scrape(stack["url"] + "/metrics") for _ in range(6)]
    return {"batch_id": batch_id, "state": state, "results": results, "rankings": rankings,
            "before": before, "after": after,
            "worker_after": scrape(stack["worker_metrics"])}


def test_batch_runs_end_to_end_under_gunicorn(ran):
    assert ran["state"] == "done"
    assert ran["results"].status_code == 200
    summary = ran["results"].json()["summary"]
    assert sorted(row["sorbent_id"] for row in summary) == sorted(SORBENTS)
    assert all(row["best_model"] in ("langmuir", "sips") for row in summary), summary
    ranked = ran["rankings"].json()
    assert ran["rankings"].status_code == 200
    rows = ranked["rows"]
    assert {r["batch_id"] for r in rows if r["sorbent_id"] in SORBENTS} == {ran["batch_id"]}


def test_metrics_move_when_a_batch_runs_and_agree_across_processes(ran):
    before, after = ran["before"], ran["after"][0]
    assert value(after, "sorbrank_batches_accepted_total") == \
        value(before, "sorbrank_batches_accepted_total") + 1
    assert value(after, "sorbrank_batches_done_total") == \
        value(before, "sorbrank_batches_done_total") + 1
    for model in ("langmuir", "sips"):
        assert value(after, "sorbrank_isotherms_fitted_total", model=model) == \
            value(before, "sorbrank_isotherms_fitted_total", model=model) + len(SORBENTS)
    assert value(after, "sorbrank_chunk_fit_duration_seconds_count") == \
        value(before, "sorbrank_chunk_fit_duration_seconds_count") + 2
    assert value(after, "sorbrank_store_size_bytes") > value(before, "sorbrank_store_size_bytes")
    assert value(after, "sorbrank_queue_depth_chunks") == 0
    assert ("sorbrank_queue_depth_chunks", ()) in after
    # every scrape, whichever gunicorn process answered, and the worker's own
    # endpoint report the same counters
    counters = {k: v for k, v in after.items() if k[0].endswith(("_total", "_count", "_bucket"))}
    assert counters
    for other in ran["after"][1:] + [ran["worker_after"]]:
        assert {k: other.get(k) for k in counters} == counters


def test_api_and_worker_logs_are_json_with_the_batch_id_and_no_token(ran, stack):
    batch_id = ran["batch_id"]
    api_text, worker_text = stack["api"].log_text(), stack["worker"].log_text()
    api_lines = [json.loads(line) for line in api_text.splitlines()
                 if line.strip() and not GUNICORN_OWN_LINE.match(line)]
    worker_lines = [json.loads(line) for line in worker_text.splitlines() if line.strip()]
    for entry in api_lines + worker_lines:
        assert {"time", "level", "logger", "message"} <= entry.keys(), entry
    posted = [e for e in api_lines if e.get("method") == "POST" and e.get("status") == 202]
    assert [e["batch_id"] for e in posted] == [batch_id]
    assert posted[0]["isotherm_count"] == len(SORBENTS) and posted[0]["duration_s"] >= 0
    assert posted[0]["path"] == "/api/v1/batches"
    finished = [e for e in worker_lines
                if e.get("batch_id") == batch_id and e["message"] == "chunk finished"]
    assert sorted(e["chunk"] for e in finished) == [0, 1]
    assert all(e["outcome"] == "done" and e["duration_s"] >= 0 for e in finished)
    assert sorted(e["isotherm_count"] for e in finished) == [1, 2]
    assert any(e.get("batch_id") == batch_id and e.get("outcome") == "done"
               and e["message"].startswith("batch finished") for e in worker_lines)
    for secret, _ in TOKENS.values():
        assert secret not in api_text and secret not in worker_text
    assert "Bearer" not in api_text
