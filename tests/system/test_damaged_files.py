"""One damaged chunk file in the store, read by a real ``sorbrank serve``.

The damage is done to a real stored file: bytes flipped inside it, the file
replaced by a valid Parquet file whose ``temperature_k`` is text, or the file
cut short. Every read that touches the table (rankings, the overview, the
sorbent pages, other batches' results and the damaged batch's own results)
must answer 200; the file is moved to ``<root>/quarantine/<batch id>/``; the
batch says which chunk is damaged and is never ``done`` with fewer rows;
/metrics counts the quarantined file; a log line names it. The chunk's inputs
are intact, so it is fitted again and the batch ends ``done`` with every row.
A damaged inputs file cannot be refitted: its chunk fails with a message
naming the damage and the batch ends ``partial``.
"""
from __future__ import annotations

import io
import json

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest
import requests
from prometheus_client.parser import text_string_to_metric_families

from conftest import (ROOT, TOKENS, clean_env, csv_batch, isotherm, start_redis, start_server,
                      start_worker, tokens_json, wait_until)

pytestmark = pytest.mark.integration


def session() -> requests.Session:
    s = requests.Session()
    s.headers["Authorization"] = f"Bearer {TOKENS['submitter'][0]}"
    return s


def submit_and_wait(s, api: str, prefix: str, n: int, procs) -> str:
    body = csv_batch([isotherm(f"{prefix}-S{i}", 1.0 + 0.3 * i, 0.04) for i in range(n)])
    resp = s.post(f"{api}/batches", data=body, headers={"Content-Type": "text/csv"}, timeout=60)
    assert resp.status_code == 202, resp.text
    batch_id = resp.json()["batch_id"]
    wait_until(lambda: s.get(f"{api}/batches/{batch_id}", timeout=10).json()["state"] == "done",
               f"batch {prefix} to finish", procs, timeout_s=120)
    return batch_id


def flip_bytes(path) -> None:
    """Flip 16 bytes inside the first page of the file's largest column.

    Not just anywhere: the writer also leaves a copy of each column's metadata
    after its pages that readers never use, and flipping that changes no value.
    """
    chunks = pq.ParquetFile(path).metadata.row_group(0)
    chunk = max((chunks.column(i) for i in range(chunks.num_columns)),
                key=lambda c: c.total_compressed_size)
    start = chunk.dictionary_page_offset if chunk.has_dictionary_page else chunk.data_page_offset
    at = start + chunk.total_compressed_size // 4
    data = bytearray(path.read_bytes())
    for i in range(at, at + 16):
        data[i] ^= 0xFF
    path.write_bytes(bytes(data))
    with pytest.raises(OSError):  # what is damaged here no reader may trust
        pq.read_table(path, page_checksum_verification=True)


def wrong_type(path) -> None:
    table = pq.read_table(path, partitioning=None)
    position = table.schema.get_field_index("temperature_k")
    table = table.set_column(position, pa.field("temperature_k", pa.string()),
                             pc.cast(table["temperature_k"], pa.string()))
    sink = io.BytesIO()
    pq.write_table(table, sink)  # a valid file, its metadata kept, one column's type wrong
    path.write_bytes(sink.getvalue())


def truncate(path) -> None:
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


DAMAGE = {"flipped_bytes": flip_bytes, "wrong_column_type": wrong_type, "truncated": truncate}


def quarantined(s, url: str) -> float:
    text = s.get(url + "/metrics", timeout=10).text
    return sum(sample.value for family in text_string_to_metric_families(text)
               for sample in family.samples if sample.name == "sorbrank_quarantined_files")


@pytest.fixture
def server(tmp_path, processes):
    env = clean_env(SORBRANK_DATA_DIR=str(tmp_path / "data"), SORBRANK_CHUNK_SIZE="2",
                    SORBRANK_EMBEDDED_WORKERS="1", SORBRANK_TOKENS=tokens_json(),
                    SORBRANK_RECONCILE_INTERVAL_S="2", PYTHONPATH=str(ROOT))
    proc, url = start_server(env, tmp_path / "logs", processes)
    return proc, url, tmp_path / "data"


def test_celery_worker_refits_a_damaged_chunk(tmp_path, processes):
    """Distributed: the API quarantines the file, the worker's broker watch
    queues the chunk again, the batch ends done with every row."""
    logs = tmp_path / "logs"
    _, broker = start_redis(logs, processes)
    env = clean_env(SORBRANK_DATA_DIR=str(tmp_path / "data"), SORBRANK_CHUNK_SIZE="2",
                    SORBRANK_TOKENS=tokens_json(), SORBRANK_BROKER_URL=broker,
                    SORBRANK_RECONCILE_INTERVAL_S="1", PYTHONPATH=str(ROOT))
    worker = start_worker(env, logs, processes)
    proc, url = start_server(env, logs, processes)
    api, s = url + "/api/v1", session()
    batch_a = submit_and_wait(s, api, "A", 4, [proc, worker])
    batch_b = submit_and_wait(s, api, "B", 2, [proc, worker])
    flip_bytes(tmp_path / "data" / "summaries" / f"batch_id={batch_a}" / "chunk-00001.parquet")
    read_everything(s, url, [batch_a, batch_b])
    assert quarantined(s, url) == 1

    def repaired():
        now = s.get(f"{api}/batches/{batch_a}", timeout=10).json()
        check_never_done_short(now)
        return now if now["state"] == "done" else None
    doc = wait_until(repaired, "the worker to refit the damaged chunk", [proc, worker],
                     timeout_s=120)
    assert doc["counts"]["done"] == 4 and [d["chunk"] for d in doc["damaged_chunks"]] == [1]
    assert len(s.get(f"{api}/batches/{batch_a}/results", timeout=30).json()["summary"]) == 4


def read_everything(s, url: str, batch_ids: list[str]) -> None:
    """Every read that touches the stored tables answers 200."""
    api = url + "/api/v1"
    paths = [f"{api}/rankings", f"{api}/rankings?format=csv", url + "/", url + "/sorbents/A-S0",
             url + "/sorbents/B-S0", f"{api}/sorbents/A-S0", f"{api}/sorbents/B-S1"]
    for batch_id in batch_ids:
        paths += [f"{api}/batches/{batch_id}", f"{api}/batches/{batch_id}/results",
                  f"{api}/batches/{batch_id}/results?table=fits&format=csv"]
    for path in paths:
        resp = s.get(path, timeout=30)
        assert resp.status_code == 200, (path, resp.status_code, resp.text[:500])


def check_never_done_short(doc: dict) -> None:
    if doc["state"] == "done":
        assert doc["counts"]["done"] == doc["counts"]["accepted"], doc
        assert all(d["repaired"] for d in doc["damaged_chunks"]), doc


@pytest.mark.parametrize("damage", sorted(DAMAGE))
@pytest.mark.parametrize("table", ["summaries", "fits"])
def test_damaged_result_file_is_quarantined_reported_and_refitted(damage, table, server):
    proc, url, data_dir = server
    api, s = url + "/api/v1", session()
    batch_a = submit_and_wait(s, api, "A", 4, [proc])
    batch_b = submit_and_wait(s, api, "B", 2, [proc])
    target = data_dir / table / f"batch_id={batch_a}" / "chunk-00000.parquet"
    DAMAGE[damage](target)

    read_everything(s, url, [batch_a, batch_b])
    assert not target.exists()
    moved = sorted((data_dir / "quarantine" / batch_a).glob(f"{table}.chunk-00000.*.parquet"))
    assert len(moved) == 1, sorted((data_dir / "quarantine").rglob("*"))
    record = json.loads(moved[0].with_suffix(".json").read_text())
    assert record["table"] == table and record["chunk"] == 0 and record["reason"], record

    doc = s.get(f"{api}/batches/{batch_a}", timeout=10).json()
    check_never_done_short(doc)
    assert [(d["chunk"], d["table"]) for d in doc["damaged_chunks"]] == [(0, table)], doc
    assert s.get(f"{api}/batches/{batch_b}", timeout=10).json()["damaged_chunks"] == []
    assert quarantined(s, url) == 1
    assert "quarantined" in proc.log_text() and f"{table}.chunk-00000" in proc.log_text()

    # the inputs are intact: the chunk is fitted again without a restart
    def repaired():
        now = s.get(f"{api}/batches/{batch_a}", timeout=10).json()
        check_never_done_short(now)
        return now if now["state"] == "done" else None
    doc = wait_until(repaired, "the damaged chunk to be fitted again", [proc], timeout_s=120)
    assert doc["counts"]["done"] == 4 and doc["damaged_chunks"][0]["repaired"], doc
    assert target.exists()
    results = s.get(f"{api}/batches/{batch_a}/results", timeout=30).json()
    assert len(results["summary"]) == 4
    assert {r["sorbent_id"] for r in results["fits"]} == {"A-S0", "A-S1", "A-S2", "A-S3"}
    read_everything(s, url, [batch_a, batch_b])


def test_damaged_inputs_file_fails_its_chunk_by_name(server):
    proc, url, data_dir = server
    api, s = url + "/api/v1", session()
    batch_a = submit_and_wait(s, api, "A", 4, [proc])
    batch_b = submit_and_wait(s, api, "B", 2, [proc])
    flip_bytes(data_dir / "inputs" / f"batch_id={batch_a}" / "chunk-00001.parquet")
    truncate(data_dir / "summaries" / f"batch_id={batch_a}" / "chunk-00001.parquet")

    read_everything(s, url, [batch_a, batch_b])

    def settled():
        now = s.get(f"{api}/batches/{batch_a}", timeout=10).json()
        check_never_done_short(now)
        return now if now["state"] in ("done", "failed", "partial") else None
    doc = wait_until(settled, "batch A to settle again", [proc], timeout_s=120)
    assert doc["state"] == "partial", doc
    assert doc["counts"] == {"accepted": 4, "done": 2, "failed": 2, "rejected": 0}, doc
    assert {(d["chunk"], d["table"]) for d in doc["damaged_chunks"]} == {(1, "inputs"),
                                                                         (1, "summaries")}
    assert [e["chunk"] for e in doc["errors"]] == [1]
    assert "inputs" in doc["errors"][0]["message"] and "quarantine" in doc["errors"][0]["message"]
    read_everything(s, url, [batch_a, batch_b])
