"""Compacted summaries (worker/store/compaction.py): rankings read through
compacted files equal the rankings of a full scan (SORBRANK_READ_INDEX=0,
the reads as they were before the index) after a re-run of a compacted
batch, a quarantined file, a lost compacted file and two compactors at
once. Data: real batches through the intake and the jobs; the changed
re-run is the same batch's summaries written again with other values (a
truth-known synthetic change)."""
from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from dataclasses import replace
from pathlib import Path

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.fs as pafs

from conftest import csv_batch, isotherm
from sorbrank.worker import jobs
from sorbrank.worker.intake import read_batch
from sorbrank.worker.store import Store, compaction
from sorbrank.worker.store import index as read_index
from sorbrank.worker.store import readmodel
from sorbrank.worker.store.rankings import RankingQuery, ranking

ROOT = Path(__file__).resolve().parents[2]


def run_batch(store: Store, sorbents, scale: float = 1.0, temperatures=(273.15, 298.15)) -> str:
    data = read_batch(csv_batch([isotherm(m, scale * (1.0 + k), 0.1, t)
                                 for k, m in enumerate(sorbents) for t in temperatures]),
                      "csv", batch_label="compaction")
    manifest = jobs.accept_batch(store, data, options={"models": ["langmuir"]}, chunk_size=2)
    for chunk in manifest["chunks"]:
        jobs.execute_chunk(store, manifest["batch_id"], chunk["index"])
    return manifest["batch_id"]


def queries(batch_id: str) -> list[RankingQuery]:
    base = RankingQuery()
    return [base, replace(base, all_results=True, limit=None),
            replace(base, sort="sorbent_id", descending=False, limit=3, offset=2),
            replace(base, sort="loading_ads_mol_per_kg", limit=2, offset=1),
            replace(base, flags=("extrapolated_adsorption_pressure",)),
            replace(base, exclude_flags=("extrapolated_adsorption_pressure",)),
            replace(base, adsorbate="co2", temperature_k=298.15, limit=None),
            replace(base, sorbent_id="CMP-A", all_results=True),
            replace(base, batch_id=batch_id, limit=None),
            replace(base, limit=1000, offset=1000)]


def _answer(result) -> str:
    return json.dumps({"rows": result.page.to_pylist(), "total": result.total,
                       "conditions": result.condition_sets}, default=str, sort_keys=True)


def rankings(root, monkeypatch, index: str, filesystem=None, store=None) -> list[str]:
    monkeypatch.setenv("SORBRANK_READ_INDEX", index)
    store = store or Store(root, filesystem=filesystem)
    readmodel.attach(store)   # as the service's reads do: listings through the read index
    batch_id = store.batch_ids()[-1]
    return [_answer(ranking(store, q)) for q in queries(batch_id)]


def compacted_batches(store: Store) -> int:
    """Batches the store's last ranking read from compacted files."""
    reader = getattr(store, "_compacted_reader", None)
    view = None if reader is None else reader.view
    if view is None:
        return 0
    return len(set().union(*(set(ids.to_pylist()) for _, _, ids in view.compacted)))


def assert_same_as_scan(root, monkeypatch, filesystem=None) -> tuple[list[str], int]:
    """Rankings with compaction equal the scan's; and how many batches came
    from compacted files (so a test knows the compacted path ran)."""
    scanned = rankings(root, monkeypatch, "0", filesystem)
    store = Store(root, filesystem=filesystem)
    through = rankings(root, monkeypatch, "1", filesystem, store)
    for query, a, b in zip(queries("x"), through, scanned):
        assert a == b, query
    return through, compacted_batches(store)


def test_rankings_through_compacted_files_equal_a_scan(tmp_path, monkeypatch):
    store = Store(tmp_path)
    first = run_batch(store, ("CMP-A", "CMP-B"))
    run_batch(store, ("CMP-A", "CMP-C"), scale=2.0)       # CMP-A again: latest wins
    run_batch(store, ("CMP-D",), scale=0.5)
    monkeypatch.setenv("SORBRANK_READ_INDEX", "1")
    assert compaction.compact(store, min_batches=10) == 0  # not worth a file yet
    assert compaction.compact(store, min_batches=1) == 3
    assert store.listing_source is None   # a worker's own listings stay directory listings
    files = sorted((tmp_path / "compacted" / "summaries").iterdir())
    assert len(files) == 1
    assert compaction.compact(store, min_batches=1) == 0   # idempotent: all held already
    assert sorted((tmp_path / "compacted" / "summaries").iterdir()) == files
    before, used = assert_same_as_scan(tmp_path, monkeypatch)
    assert used == 3
    assert json.loads(before[0])["total"] > 0

    # a batch finished after the compaction: from its own files until compacted
    run_batch(store, ("CMP-A", "CMP-E"), scale=3.0)
    _, used = assert_same_as_scan(tmp_path, monkeypatch)
    assert used == 3
    assert compaction.compact(store, min_batches=1) == 1
    assert compaction.compact(store, min_batches=1, merge_files=1) == 4  # two files merged
    assert len(list((tmp_path / "compacted" / "summaries").iterdir())) == 1
    _, used = assert_same_as_scan(tmp_path, monkeypatch)
    assert used == 4
    assert first in Store(tmp_path).batch_ids()


def _rerun_with_other_values(store: Store, batch_id: str) -> None:
    """The batch's summaries written again with other loadings, indexed as a
    forced re-run's chunk is (a newer entry than its seal)."""
    data = store.read_chunk("summaries", batch_id, 0)
    data = data.set_column(data.schema.get_field_index("loading_ads_mol_per_kg"),
                           "loading_ads_mol_per_kg",
                           pc.multiply(data["loading_ads_mol_per_kg"], 10.0))
    store.write_table("summaries", batch_id, 0, data)
    read_index.record_files(store, batch_id, "chunk-00000", [("summaries", 0, data)])


def test_a_rerun_quarantine_and_lost_file_after_compaction(tmp_path, monkeypatch):
    store = Store(tmp_path)
    rerun = run_batch(store, ("CMP-A", "CMP-B"))
    damaged = run_batch(store, ("CMP-A", "CMP-C"), scale=2.0)
    run_batch(store, ("CMP-D",), scale=0.5)
    monkeypatch.setenv("SORBRANK_READ_INDEX", "1")
    assert compaction.compact(store, min_batches=1) == 3
    before, used = assert_same_as_scan(tmp_path, monkeypatch)
    assert used == 3

    # a re-run after compaction with other values: the scan sees them, so must the ranking
    _rerun_with_other_values(store, rerun)
    changed, used = assert_same_as_scan(tmp_path, monkeypatch)
    assert changed != before and used == 2
    # compacted again: the new file holds the re-run's rows, the old one its stale copy
    assert compaction.compact(store, min_batches=1) == 1
    again, used = assert_same_as_scan(tmp_path, monkeypatch)
    assert again == changed and used == 3

    # a damaged file moved aside: its rows are gone from the scan and the ranking
    store.quarantine(str(store.table_path("summaries", damaged, 0)), "test: damaged")
    gone, used = assert_same_as_scan(tmp_path, monkeypatch)
    assert gone != again and used == 2

    # every compacted file lost: the batches are read from their files
    for path in (tmp_path / "compacted" / "summaries").iterdir():
        path.unlink()
    lost, used = assert_same_as_scan(tmp_path, monkeypatch)
    assert lost == gone and used == 0


def test_a_long_running_reader_follows_the_compacted_files(tmp_path, monkeypatch):
    """One Store across compaction, merge and loss (a service process)."""
    store = Store(tmp_path)
    for n in range(3):
        run_batch(store, (f"CMP-{n}", "CMP-A"), scale=1.0 + n)
    monkeypatch.setenv("SORBRANK_READ_INDEX", "1")
    reader = Store(tmp_path)
    expected = rankings(tmp_path, monkeypatch, "0")
    assert rankings(tmp_path, monkeypatch, "1", store=reader) == expected
    assert compacted_batches(reader) == 0
    compaction.compact(store, min_batches=1)
    assert rankings(tmp_path, monkeypatch, "1", store=reader) == expected
    assert compacted_batches(reader) == 3
    run_batch(store, ("CMP-Z",))
    compaction.compact(store, min_batches=1, merge_files=1)
    expected = rankings(tmp_path, monkeypatch, "0")
    assert rankings(tmp_path, monkeypatch, "1", store=reader) == expected
    assert compacted_batches(reader) == 4
    for path in (tmp_path / "compacted" / "summaries").iterdir():
        path.unlink()
    assert rankings(tmp_path, monkeypatch, "1", store=reader) == expected
    assert compacted_batches(reader) == 0


_COMPACTOR = textwrap.dedent("""
    import sys
    sys.path.insert(0, {tests!r})
    from conftest import csv_batch, isotherm
    from sorbrank.worker import jobs
    from sorbrank.worker.intake import read_batch
    from sorbrank.worker.store import Store, compaction
    store = Store({root!r})
    name = sys.argv[1]
    for n in range(3):
        data = read_batch(csv_batch([isotherm(s, 1.0 + n, 0.1, 298.15)
                                     for s in (f"{{name}}-{{n}}", "CMP-A")]), "csv",
                          batch_label=name)
        manifest = jobs.accept_batch(store, data, options={{"models": ["langmuir"]}},
                                     chunk_size=2)
        for chunk in manifest["chunks"]:
            jobs.execute_chunk(store, manifest["batch_id"], chunk["index"])
        for _ in range(3):
            compaction.compact(store, min_batches=1, merge_files=1)
""")


def test_two_compactors_at_once(tmp_path, monkeypatch):
    """Two processes write batches and compact (and merge) the same store at
    the same time, no lock between them."""
    script = _COMPACTOR.format(tests=str(ROOT / "tests"), root=str(tmp_path))
    procs = [subprocess.Popen([sys.executable, "-c", script, name], stderr=subprocess.PIPE,
                              text=True) for name in ("P1", "P2")]
    for proc in procs:
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, err
    monkeypatch.setenv("SORBRANK_READ_INDEX", "1")
    compaction.compact(Store(tmp_path), min_batches=1)
    found, used = assert_same_as_scan(tmp_path, monkeypatch)
    assert used == 6
    everything = json.loads(found[1])
    assert everything["total"] == 12   # 6 batches x 2 isotherms, none lost or doubled


def test_compaction_on_another_filesystem(tmp_path, monkeypatch):
    """A pyarrow filesystem that is not the local one (no local fast paths)."""
    filesystem = pafs.SubTreeFileSystem(str(tmp_path), pafs.LocalFileSystem())
    store = Store("sorbrank", filesystem=filesystem)
    run_batch(store, ("CMP-A", "CMP-B"))
    run_batch(store, ("CMP-A",), scale=2.0)
    monkeypatch.setenv("SORBRANK_READ_INDEX", "1")
    assert compaction.compact(store, min_batches=1) == 2
    _, used = assert_same_as_scan("sorbrank", monkeypatch, filesystem)
    assert used == 2


def test_the_index_cli_compacts(tmp_path, monkeypatch):
    store = Store(tmp_path)
    run_batch(store, ("CMP-A",))
    out = subprocess.run([sys.executable, "-m", "sorbrank.worker.store.index", "consolidate",
                          "--data-dir", str(tmp_path)], capture_output=True, text=True,
                         check=True, cwd=ROOT).stdout
    assert "compacted the summaries of 1 batch(es)" in out
    held = compaction.read_sources(store, str(next((tmp_path / "compacted" / "summaries")
                                                   .iterdir())))
    assert list(held) == store.batch_ids()
    _, used = assert_same_as_scan(tmp_path, monkeypatch)
    assert used == 1


def test_the_rankings_api_reads_through_the_index(tmp_path):
    """GET /api/v1/rankings as a process's first read attaches the read index."""
    from sorbrank.service.app import create_app
    from sorbrank.service.config import load_settings

    run_batch(Store(tmp_path), ("CMP-A",))
    app = create_app(load_settings({"SORBRANK_DATA_DIR": str(tmp_path)}),
                     enqueue=lambda batch_id, chunk: None, queue_depth=lambda: 0)
    response = app.test_client().get("/api/v1/rankings")
    assert response.status_code == 200, response.data[:300]
    store = app.extensions["sorbrank"].store
    assert getattr(store, "_read_index", None) is not None
    assert store.listing_source is not None


def test_compacted_file_holds_the_declared_columns_and_batch_id(tmp_path, monkeypatch):
    store = Store(tmp_path)
    batch_id = run_batch(store, ("CMP-A",))   # two isotherms: one chunk
    monkeypatch.setenv("SORBRANK_READ_INDEX", "1")
    compaction.compact(store, min_batches=1)
    import pyarrow.parquet as pq
    merged = pq.read_table(next((tmp_path / "compacted" / "summaries").iterdir()))
    own = store.read_chunk("summaries", batch_id, 0)
    assert merged.column_names == own.column_names + ["batch_id"]
    assert merged.drop_columns(["batch_id"]).replace_schema_metadata(None).equals(
        own.replace_schema_metadata(None))
    assert set(merged["batch_id"].to_pylist()) == {batch_id}
    assert isinstance(merged["batch_id"].type, type(pa.string()))


def test_a_damaged_compacted_file_is_read_around(tmp_path, monkeypatch):
    """A flipped byte in a compacted file's data (page checksums) or footer:
    the batches are read from their own files, the answers stay the scan's."""
    store = Store(tmp_path)
    run_batch(store, ("CMP-A", "CMP-B"))
    run_batch(store, ("CMP-A",), scale=2.0)
    monkeypatch.setenv("SORBRANK_READ_INDEX", "1")
    compaction.compact(store, min_batches=1)
    path = next((tmp_path / "compacted" / "summaries").iterdir())
    good = path.read_bytes()
    expected = rankings(tmp_path, monkeypatch, "0")
    for at in (len(good) // 3, len(good) // 2, len(good) - 20):
        damaged = bytearray(good)
        damaged[at] ^= 0xFF
        path.write_bytes(bytes(damaged))
        assert rankings(tmp_path, monkeypatch, "1") == expected, at
