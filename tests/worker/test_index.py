"""The read index (worker/store/index.py) gives the same answers as a full
scan of the tables (SORBRANK_READ_INDEX=0, the reads as they were before the
index), after concurrent writers, a lost index, re-run chunks and changes
the index did not record. Data: real batches through the intake and the jobs.
"""
from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import pyarrow.fs as pafs
import pytest

from conftest import csv_batch, isotherm
from sorbrank.service.metrics import StoreCollector
from sorbrank.worker import jobs
from sorbrank.worker.intake import read_batch
from sorbrank.worker.store import Store
from sorbrank.worker.store import index as read_index
from sorbrank.worker.store import index_reader
from sorbrank.worker.store import readmodel

ROOT = Path(__file__).resolve().parents[2]
SORBENTS = ("IDX-A", "IDX-B", "IDX-C")


def batch(sorbents=SORBENTS, temperatures=(273.15, 298.15), scale=1.0):
    return read_batch(csv_batch([isotherm(m, scale * (1.0 + k), 0.1, t)
                                 for k, m in enumerate(sorbents) for t in temperatures]),
                      "csv", batch_label="index")


def run_batch(store: Store, **kwargs) -> str:
    manifest = jobs.accept_batch(store, batch(**kwargs), options={"models": ["langmuir"]},
                                 chunk_size=2)
    for chunk in manifest["chunks"]:
        jobs.execute_chunk(store, manifest["batch_id"], chunk["index"])
    return manifest["batch_id"]


def _plain(value):
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, list):
        return [_plain(v) for v in value]
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in sorted(value.items())}
    return value


def _rows(table) -> list | None:
    return None if table is None else json.dumps(_plain(table.to_pylist()), default=str)


def reads(root, filesystem=None) -> dict:
    """Every read the API, the pages and /metrics make, on a fresh Store."""
    store = Store(root, filesystem=filesystem)
    out = {"batches": readmodel.batch_ids(store), "choices": readmodel.filter_choices(store),
           "metrics": StoreCollector(store).figures()}
    sorbents = sorted({r for t in ("inputs",) if store.dataset(t) is not None
                       for r in store.query(t).column("sorbent_id").to_pylist()})
    isotherms = sorted(set(store.query("inputs").column("isotherm_id").to_pylist())) \
        if store.dataset("inputs") is not None else []
    for sorbent in sorbents:
        out[f"tables {sorbent}"] = {k: _rows(t) for k, t in
                                    readmodel.sorbent_tables(store, sorbent).items()}
        page, total = readmodel.sorbent_results(store, sorbent)
        out[f"results {sorbent}"] = (_rows(page), total)
        out[f"inputs {sorbent}"] = readmodel.sorbent_input_count(store, sorbent)
        out[f"qst {sorbent}"] = json.dumps(_plain(readmodel.qst_rows(store, sorbent)), default=str)
    for isotherm_id in isotherms:
        found = readmodel.load_isotherm(store, isotherm_id)
        out[f"isotherm {isotherm_id}"] = json.dumps(_plain(found.record()), default=str)
    out["sorbents"], out["isotherms"] = sorbents, isotherms
    return out


def assert_index_matches_scan(monkeypatch, root, filesystem=None) -> dict:
    monkeypatch.setenv("SORBRANK_READ_INDEX", "0")
    scanned = reads(root, filesystem)
    monkeypatch.setenv("SORBRANK_READ_INDEX", "1")
    indexed = reads(root, filesystem)
    assert indexed.keys() == scanned.keys()
    for key in scanned:
        assert indexed[key] == scanned[key], key
    # the listing the rankings use equals a recursive listing of each table
    store = Store(root, filesystem=filesystem)
    index = read_index.read_index(store)
    for table in ("inputs", "summaries", "fits", "sorbents"):
        listed = store._index(table)._listed(store, str(store._join(table)))
        assert index.listing(table) == listed, table
    return indexed


def loose(root: Path) -> list[str]:
    folder = root / "index" / "loose"
    return sorted(p.name for p in folder.iterdir()) if folder.exists() else []


def test_index_matches_a_full_scan_and_consolidates(tmp_path, monkeypatch):
    store = Store(tmp_path)
    first = run_batch(store)
    run_batch(store, sorbents=("IDX-A", "IDX-D"), scale=2.0)   # IDX-A measured again: latest wins
    assert sum(".seal." in n for n in loose(tmp_path)) == 2
    before = assert_index_matches_scan(monkeypatch, tmp_path)
    assert before["sorbents"] == ["IDX-A", "IDX-B", "IDX-C", "IDX-D"]
    assert before["results IDX-A"][1] == 4   # two batches x two temperatures
    assert len(before["metrics"]) == 2 and all(f.state == "done" for f in before["metrics"])

    assert read_index.consolidate(store, min_seals=2) == 2
    assert loose(tmp_path) == []   # seals merged, the entries they cover deleted
    assert len(list((tmp_path / "index" / "segments").iterdir())) == 1
    assert assert_index_matches_scan(monkeypatch, tmp_path) == before
    # idempotent: nothing left to merge, the same answers
    assert read_index.consolidate(store, min_seals=1, merge_segments=1) <= 1
    assert assert_index_matches_scan(monkeypatch, tmp_path) == before
    assert first in before["batches"]


_WRITER = textwrap.dedent("""
    import sys
    sys.path.insert(0, {tests!r})
    from conftest import csv_batch, isotherm
    from sorbrank.worker import jobs
    from sorbrank.worker.intake import read_batch
    from sorbrank.worker.store import Store
    from sorbrank.worker.store import index as read_index
    store = Store({root!r})
    name = sys.argv[1]
    for n in range(4):
        sorbents = (f"{{name}}-{{n}}", "SHARED")
        data = read_batch(csv_batch([isotherm(s, 1.0 + n, 0.1, t) for s in sorbents
                                     for t in (273.15, 298.15)]), "csv", batch_label=name)
        manifest = jobs.accept_batch(store, data, options={{"models": ["langmuir"]}},
                                     chunk_size=2)
        for chunk in manifest["chunks"]:
            jobs.execute_chunk(store, manifest["batch_id"], chunk["index"])
        read_index.consolidate(store, min_seals=2, merge_segments=1)
""")


def test_two_writer_processes_at_once(tmp_path, monkeypatch):
    """Two processes accept, fit, seal and consolidate into one store at the
    same time (no lock between them): the index holds every batch once."""
    script = _WRITER.format(tests=str(ROOT / "tests"), root=str(tmp_path))
    procs = [subprocess.Popen([sys.executable, "-c", script, name], stderr=subprocess.PIPE,
                              text=True) for name in ("W1", "W2")]
    for proc in procs:
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, err
    found = assert_index_matches_scan(monkeypatch, tmp_path)
    assert len(found["batches"]) == 8
    assert found["results SHARED"][1] == 16   # 8 batches x 2 temperatures, none lost or doubled
    assert len(found["results SHARED"][0] and json.loads(found["results SHARED"][0])) == 2


def test_a_lost_index_is_rebuilt_from_the_tables(tmp_path, monkeypatch):
    store = Store(tmp_path)
    run_batch(store)
    run_batch(store, sorbents=("IDX-B",), scale=3.0)
    read_index.consolidate(store, min_seals=1)
    before = assert_index_matches_scan(monkeypatch, tmp_path)

    shutil.rmtree(tmp_path / "index")
    assert assert_index_matches_scan(monkeypatch, tmp_path) == before
    # the readers sealed the finished batches again, so the next process trusts them
    assert sum(".seal." in n for n in loose(tmp_path)) == 2

    # one segment of two lost: its batches are found by listing batches/
    read_index.consolidate(store, min_seals=1)
    run_batch(store, sorbents=("IDX-E",))
    read_index.consolidate(store, min_seals=1, merge_segments=8)
    segments = sorted((tmp_path / "index" / "segments").iterdir())
    assert len(segments) == 2
    segments[0].unlink()
    after = assert_index_matches_scan(monkeypatch, tmp_path)
    assert len(after["batches"]) == 3


def test_a_retried_chunk_and_a_forced_rerun(tmp_path, monkeypatch):
    store = Store(tmp_path)
    manifest = jobs.accept_batch(store, batch(), options={"models": ["langmuir"]}, chunk_size=2)
    batch_id = manifest["batch_id"]
    # a first attempt that died after writing its results, before its entry and status
    jobs.execute_chunk(store, batch_id, 0)
    entries = [n for n in loose(tmp_path) if ".chunk-00000." in n]
    assert len(entries) == 1
    (tmp_path / "index" / "loose" / entries[0]).unlink()
    store.remove_chunk_status(batch_id, 0)
    running = assert_index_matches_scan(monkeypatch, tmp_path)   # open batch: read from files
    assert running["inputs IDX-A"] == 2
    for chunk in manifest["chunks"]:
        jobs.execute_chunk(store, batch_id, chunk["index"])   # the retry, then the rest
    done = assert_index_matches_scan(monkeypatch, tmp_path)
    assert done["results IDX-A"][1] == 2   # the retried chunk's rows once, not twice

    # a forced re-run after the batch was sealed rewrites its files: the newer
    # entry reopens the batch until a newer seal covers it
    jobs.run_chunk(store, batch_id, 1, force=True)
    again = assert_index_matches_scan(monkeypatch, tmp_path)
    assert {k: v for k, v in again.items() if k != "metrics"} == \
        {k: v for k, v in done.items() if k != "metrics"}   # (its wall time is new)


def test_changes_the_index_did_not_record_are_detected(tmp_path, monkeypatch):
    store = Store(tmp_path)
    sealed = run_batch(store)
    assert_index_matches_scan(monkeypatch, tmp_path)
    # a batch written by a writer that kept no index (an older sorbrank): no entries at all
    other = run_batch(store, sorbents=("IDX-OLD",))
    for name in loose(tmp_path):
        if name.startswith(other):
            (tmp_path / "index" / "loose" / name).unlink()
    found = assert_index_matches_scan(monkeypatch, tmp_path)
    assert "IDX-OLD" in found["sorbents"] and other in found["batches"]

    # a damaged file moved aside after the seal: the batch is open again, its
    # rows gone from every read as from the scan
    victim = store.table_path("summaries", sealed, 0)
    store.quarantine(str(victim), "test: damaged")
    damaged = assert_index_matches_scan(monkeypatch, tmp_path)
    assert damaged["results IDX-A"][1] == 0
    jobs.execute_chunk(store, sealed, 0)   # refitted: sealed again
    assert assert_index_matches_scan(monkeypatch, tmp_path)["results IDX-A"][1] == 2


def test_a_store_on_another_filesystem_is_rechecked(tmp_path, monkeypatch):
    """Without cheap local listings, batches no entry announced appear after
    RECHECK_S (0 here); everything else as on a local store."""
    monkeypatch.setattr(index_reader, "RECHECK_S", 0.0)
    filesystem = pafs.SubTreeFileSystem(str(tmp_path), pafs.LocalFileSystem())
    store = Store("sorbrank", filesystem=filesystem)
    run_batch(store)
    hidden = run_batch(store, sorbents=("IDX-SUB",))
    for name in os.listdir(tmp_path / "sorbrank" / "index" / "loose"):
        if name.startswith(hidden):
            os.unlink(tmp_path / "sorbrank" / "index" / "loose" / name)
    found = assert_index_matches_scan(monkeypatch, "sorbrank", filesystem)
    assert hidden in found["batches"]


@pytest.mark.parametrize("value", ["0", "false"])
def test_the_index_can_be_switched_off(monkeypatch, value):
    monkeypatch.setenv("SORBRANK_READ_INDEX", value)
    assert not read_index.enabled()
    assert read_index.read_index(Store("/nonexistent-sorbrank-store")) is None
