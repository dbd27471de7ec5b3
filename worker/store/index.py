"""The read index: which files hold a sorbent's and an isotherm's rows, the
batch listing and the figures of finished batches, kept so that reads do not
rescan the whole store.

Why: every read used to list every table directory and open every chunk
file (a sorbent's record took 28 s at 14,000 batches). The index answers
"which files" from a few consolidated files; the reads then open only those.

On disk, under ``<root>/index/`` (every file written atomically, never
rewritten in place, so writers on several processes or machines need no lock):

    loose/<batch id>.accepted.<ns>-<token>.parquet   at acceptance: its inputs' key rows
    loose/<batch id>.chunk-00003.<ns>-<token>.parquet  as a chunk's results land
    loose/<batch id>.seal.<ns>-<token>.parquet       at completion: every key row of the
                                                     batch and its figures for /metrics
    segments/segment-<sha256>.parquet                many seals consolidated into one file

Each file is a table of key rows (``ROW_SCHEMA``): per data file of the
batch, the distinct (isotherm_id, sorbent_id, adsorbate, temperature_k,
branch) it holds, the file's size and modification time, and the quality
flags of summaries rows; a ``_batch`` row carries the batch's record (JSON).

What a reader believes, per batch:
* a batch with a seal is read from its newest seal, unless something newer
  says it changed: a loose entry of that batch written after the seal (a
  forced re-run), or a quarantine record newer than the seal (a damaged file
  moved aside: the batch is refitted). Such a batch is *open*.
* an open batch (running, or without a seal, or changed since it) is read
  from its files: its four partition directories are listed on every
  refresh where they changed, and a file is opened only when its size or
  modification time is not already in the index. Once its ``final.json`` exists the reader writes
  its seal (when the store is writable), so the next process trusts it.
* batches nobody indexed (an index directory lost or deleted, a store from
  before the index, a writer that died between its files and its entry) are
  found by listing ``batches/``: on a local store whenever the directory's
  modification time changed (or is under 2 s old: a change in the same clock
  tick cannot hide), elsewhere every ``index_reader.RECHECK_S`` seconds;
  they are then open, as above. So a lost or stale index costs time, never
  a wrong answer; ``rebuild`` seals every finished batch at once.

Consolidation (``consolidate``) merges loose seals into a segment named by
the hash of what it holds, then deletes the loose files it consumed;
segments are merged the same way. Readers list ``loose/`` before
``segments/``, and a consolidation writes its segment before deleting, so a
reader always sees every batch at least once; duplicates resolve to the
newest seal. Two consolidations at once write the same or overlapping
segments: harmless. A consolidation that merged seals also compacts the
summaries of finished batches for the rankings (``compaction.py``). Set
SORBRANK_READ_INDEX=0 to read by scanning instead (what the benchmark
compares against).
"""
from __future__ import annotations

import hashlib
import json
import logging
import os
import posixpath
import secrets
import time
from typing import Any, Iterable

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from .. import fs
from .layout import TABLES

log = logging.getLogger(__name__)

INDEX_DIR = "index"
LOOSE_DIR = "loose"
SEGMENTS_DIR = "segments"
SCHEMAS_DIR = "schemas"
# columns every table's files have (or lack) whatever the schema version
KEY_COLUMNS = ("isotherm_id", "sorbent_id", "adsorbate", "temperature_k", "branch")
FLAG_COLUMNS = ("quality_flags", "flags")   # the summaries' flags, by either name
BATCH_ROW = "_batch"                        # the ``table`` of a row carrying a batch record
ROW_SCHEMA = pa.schema([
    ("table", pa.string()), ("batch_id", pa.string()), ("chunk", pa.int32()),
    ("file_size", pa.int64()), ("file_mtime_ns", pa.int64()),
    ("isotherm_id", pa.string()), ("sorbent_id", pa.string()), ("adsorbate", pa.string()),
    ("temperature_k", pa.float64()), ("branch", pa.string()),
    ("quality_flags", pa.list_(pa.string())), ("record_json", pa.string()),
])
SCHEMAS_KEY = b"sorbrank.index.schemas"   # per table: the files' schemas, serialized
# loose seals that make a consolidation worth its write; segments merged when more
CONSOLIDATE_SEALS = 200
MERGE_SEGMENTS = 8


def enabled() -> bool:
    return os.environ.get("SORBRANK_READ_INDEX", "1").strip().lower() not in ("0", "false", "no")


# -- key rows of data files ---------------------------------------------------

def _empty_rows() -> pa.Table:
    return ROW_SCHEMA.empty_table()


def key_rows(table: str, batch_id: str, chunk: int, data: pa.Table, size: int | None,
             mtime_ns: int | None) -> pa.Table:
    """The index rows of one data file holding ``data``: its distinct key
    tuples (summaries: every row, with its flags); one row of nulls for a
    file without rows, so that the file is still known."""
    n = data.num_rows
    cols: dict[str, pa.Array] = {}
    for name in KEY_COLUMNS:
        target = ROW_SCHEMA.field(name).type
        if name in data.column_names:
            column = data[name].combine_chunks()
            cols[name] = column.cast(target) if not column.type.equals(target) else column
        else:
            cols[name] = pa.nulls(n, target)
    flag_name = next((c for c in FLAG_COLUMNS if c in data.column_names), None)
    if table == "summaries" and flag_name is not None:
        flags = data[flag_name].combine_chunks()
        cols["quality_flags"] = flags if flags.type.equals(pa.list_(pa.string())) else \
            flags.cast(pa.list_(pa.string()))
        keys = pa.table(cols)
    else:
        keys = pa.table(cols)
        if n:
            keys = keys.group_by(list(KEY_COLUMNS), use_threads=False).aggregate([])
        keys = keys.append_column("quality_flags", pa.nulls(keys.num_rows, pa.list_(pa.string())))
    if keys.num_rows == 0:
        keys = pa.table({name: pa.nulls(1, ROW_SCHEMA.field(name).type)
                         for name in (*KEY_COLUMNS, "quality_flags")})
    m = keys.num_rows
    out = {"table": pa.array([table] * m, pa.string()),
           "batch_id": pa.array([batch_id] * m, pa.string()),
           "chunk": pa.array([chunk] * m, pa.int32()),
           "file_size": pa.array([size] * m, pa.int64()),
           "file_mtime_ns": pa.array([mtime_ns] * m, pa.int64())}
    for name in (*KEY_COLUMNS, "quality_flags"):
        out[name] = keys[name]
    out["record_json"] = pa.nulls(m, pa.string())
    return pa.table(out, schema=ROW_SCHEMA)


def _batch_row(batch_id: str, record: dict) -> pa.Table:
    row: dict[str, list[Any]] = {name: [None] for name in ROW_SCHEMA.names}
    row.update(table=[BATCH_ROW], batch_id=[batch_id],
               record_json=[json.dumps(record, sort_keys=True)])
    return pa.table(row, schema=ROW_SCHEMA)


def _read_key_rows(store, table: str, batch_id: str, chunk: int, path: str,
                   size: int | None, mtime_ns: int | None) -> tuple[pa.Table, pa.Schema]:
    schema = pq.read_schema(path, filesystem=store.fs)
    names = [c for c in (*KEY_COLUMNS, *FLAG_COLUMNS) if c in schema.names]
    data = pq.read_table(path, filesystem=store.fs, columns=names, partitioning=None)
    return key_rows(table, batch_id, chunk, data, size, mtime_ns), schema


def _chunk_of(name: str) -> int | None:
    if name.startswith("chunk-") and name.endswith(".parquet") and name[6:11].isdigit() \
            and len(name) == len("chunk-00000.parquet"):
        return int(name[6:11])
    return None


def _bare(schema: pa.Schema) -> pa.Schema:
    """Names and types only: the column descriptions stay in the data files."""
    return pa.schema([pa.field(f.name, f.type, f.nullable) for f in schema])


# Schemas are kept once each, by content (schemas/<sha256>.arrow, create-if-absent):
# nearly every batch has the same ones, and a fits schema is tens of kB.
_SCHEMA_CACHE: dict[str, pa.Schema] = {}
_SCHEMAS_WRITTEN: set[tuple[str, str]] = set()   # (store root, hash) known on disk


def _schema_ref(store, schema: pa.Schema) -> str:
    data = _bare(schema).serialize().to_pybytes()
    digest = hashlib.sha256(data).hexdigest()
    if (str(store.root), digest) not in _SCHEMAS_WRITTEN:
        path = posixpath.join(_dir(store, SCHEMAS_DIR), f"{digest}.arrow")
        if store.fs.get_file_info(path).type != pafs.FileType.File:
            fs.create_if_absent(store.fs, path, data)
        _SCHEMAS_WRITTEN.add((str(store.root), digest))
    _SCHEMA_CACHE.setdefault(digest, _bare(schema))
    return digest


def _schema_of(store, digest: str) -> pa.Schema:
    schema = _SCHEMA_CACHE.get(digest)
    if schema is None:
        data = fs.read_bytes(store.fs, posixpath.join(_dir(store, SCHEMAS_DIR), f"{digest}.arrow"))
        if data is None:
            raise FileNotFoundError(f"read index: schema {digest} is missing")
        schema = _SCHEMA_CACHE[digest] = pa.ipc.read_schema(pa.py_buffer(data))
    return schema


def _schemas_meta(store, schemas: dict[str, list[pa.Schema]]) -> bytes:
    return json.dumps({t: sorted({_schema_ref(store, s) for s in found})
                       for t, found in schemas.items()}).encode()


def _schema_refs(meta: dict | None) -> dict[str, list[str]]:
    raw = (meta or {}).get(SCHEMAS_KEY)
    return json.loads(raw) if raw else {}


def _schemas_from(store, meta: dict | None) -> dict[str, pa.Schema]:
    return {t: _unify([_schema_of(store, d) for d in refs])
            for t, refs in _schema_refs(meta).items()}


# -- writing entries (the jobs call these; a failure never fails a job) ------

def _dir(store, *parts: str) -> str:
    return str(store._join(INDEX_DIR, *parts))


def _write_entry(store, name: str, rows: pa.Table, schemas: dict[str, pa.Schema]) -> str:
    meta = _schemas_meta(store, {t: [s] for t, s in schemas.items() if s is not None})
    rows = rows.replace_schema_metadata({SCHEMAS_KEY: meta})
    path = posixpath.join(_dir(store, LOOSE_DIR), name)
    fs.atomic_write(store.fs, path, lambda fh: pq.write_table(rows, fh))
    return path


def _entry_name(batch_id: str, kind: str) -> str:
    return f"{batch_id}.{kind}.{time.time_ns():020d}-{secrets.token_hex(4)}.parquet"


def _file_stat(store, path: str) -> tuple[int | None, int | None]:
    info = store.fs.get_file_info(path)
    return info.size, info.mtime_ns


def _best_effort(what: str, batch_id: str):
    def wrap(fn):
        def run(*args, **kwargs):
            try:
                return fn(*args, **kwargs)
            except Exception as exc:  # noqa: BLE001 -- readers then read the batch from its files
                log.warning("read index: could not record %s of batch %s (%s); readers "
                            "will read its files", what, batch_id, exc)
                return None
        return run
    return wrap


def record_files(store, batch_id: str, kind: str, tables: Iterable[tuple[str, int, pa.Table]]
                 ) -> str | None:
    """Index the data files just written: ``tables`` as (table, chunk, the data
    written). Called after the files and before the status that announces
    them, so every chunk counted as done has its entry (unless it failed)."""
    @_best_effort(kind, batch_id)
    def write():
        parts, schemas = [], {}
        for table, chunk, data in tables:
            path = str(store.table_path(table, batch_id, chunk))
            size, mtime_ns = _file_stat(store, path)
            if size is None:
                continue
            parts.append(key_rows(table, batch_id, chunk, data, size, mtime_ns))
            if table not in schemas:  # the file's own (conformed) schema, read once per table
                schemas[table] = pq.read_schema(path, filesystem=store.fs)
        rows = pa.concat_tables(parts) if parts else _empty_rows()
        return _write_entry(store, _entry_name(batch_id, kind), rows, schemas)
    return write()


def batch_record(store, batch_id: str) -> dict | None:
    """What the index keeps of a finished batch (None while unfinished): its
    final state and the figures /metrics reports (from the chunk statuses,
    as ``service/metrics.py`` computed them per scrape)."""
    final = store.read_final(batch_id)
    if final is None:
        return None
    manifest = store.read_manifest(batch_id) or {}
    fitted: dict[str, int] = {}
    durations = []
    for status in store.read_chunk_statuses(batch_id).values():
        if status.get("state") != "done":
            continue
        for model, count in (status.get("fitted_by_model") or {}).items():
            fitted[model] = fitted.get(model, 0) + int(count)
        if status.get("fit_duration_s") is not None:
            durations.append(float(status["fit_duration_s"]))
    return {"batch_id": batch_id, "state": final.get("state"),
            "accepted_at": manifest.get("accepted_at"), "label": manifest.get("label"),
            "fitted_by_model": fitted, "chunk_durations_s": durations,
            "size_bytes": store.batch_size_bytes(batch_id),
            "sealed_at_ns": time.time_ns()}


def seal_batch(store, batch_id: str, known: dict | None = None) -> str | None:
    """Write the seal of a finished batch: every key row of its files (read
    from ``known`` {path: (size, mtime, rows)} where they match, else from
    the file) and its record. None when the batch is not finished."""
    @_best_effort("the seal", batch_id)
    def write():
        record = batch_record(store, batch_id)
        if record is None:
            return None
        rows, schemas = _batch_rows_from_files(store, batch_id, known or {})
        rows = pa.concat_tables([rows, _batch_row(batch_id, record)])
        return _write_entry(store, _entry_name(batch_id, "seal"), rows, schemas)
    return write()


def _batch_rows_from_files(store, batch_id: str, known: dict
                           ) -> tuple[pa.Table, dict[str, pa.Schema]]:
    """Key rows of every data file of the batch as its directories list them now."""
    parts: list[pa.Table] = []
    schemas: dict[str, pa.Schema] = {}
    for table in TABLES:
        folder = str(store._join(table, f"batch_id={batch_id}"))
        for info in fs.list_dir(store.fs, folder):
            chunk = _chunk_of(info.base_name)
            if info.type != pafs.FileType.File or chunk is None:
                continue
            held = known.get(info.path)
            if held is not None and held[0] == info.size and held[1] == info.mtime_ns:
                parts.append(held[2])
                if held[3] is not None:
                    schemas.setdefault(table, held[3])
                continue
            try:
                rows, schema = _read_key_rows(store, table, batch_id, chunk, info.path,
                                              info.size, info.mtime_ns)
            except FileNotFoundError:
                continue  # moved aside a moment ago
            except (OSError, pa.ArrowException) as exc:
                if fs.out_of_space(exc):
                    raise
                continue  # damaged: the table reads quarantine it; it is no data
            parts.append(rows)
            schemas.setdefault(table, schema)
    return (pa.concat_tables(parts) if parts else _empty_rows()), schemas


# -- consolidation ------------------------------------------------------------

def consolidate(store, min_seals: int = CONSOLIDATE_SEALS, merge_segments: int = MERGE_SEGMENTS
                ) -> int:
    """Merge loose seals into one segment once there are ``min_seals`` of
    them, and segments into one once there are more than ``merge_segments``;
    delete what was merged (after the merged file is durable). Returns the
    number of files merged. Idempotent, safe beside readers and other
    consolidations (see the module text)."""
    merged = 0
    loose_dir, seg_dir = _dir(store, LOOSE_DIR), _dir(store, SEGMENTS_DIR)
    loose = _names(store, loose_dir)
    seals = [n for n in loose if ".seal." in n]
    if seals and len(seals) >= min_seals:
        merged += _merge(store, [posixpath.join(loose_dir, n) for n in seals], consumed_loose=loose)
    segments = _names(store, seg_dir)
    if len(segments) > merge_segments:
        merged += _merge(store, [posixpath.join(seg_dir, n) for n in segments])
    return merged


def consolidate_quietly(store) -> int:
    """``consolidate`` for a job: a failure is logged, never raised (the loose
    files stay, and the next completion tries again)."""
    try:
        merged = consolidate(store)
    except (OSError, pa.ArrowException) as exc:
        log.warning("read index: consolidation failed (%s); it is tried again", exc)
        return 0
    if merged:  # the seals just merged: their summaries merged for the rankings too
        from .compaction import compact_quietly
        compact_quietly(store)
    return merged


def _names(store, folder: str) -> list[str]:
    return sorted(i.base_name for i in fs.list_dir(store.fs, folder)
                  if i.type == pafs.FileType.File and i.base_name.endswith(".parquet")
                  and not i.base_name.startswith((".", "_")))


def _merge(store, paths: list[str], consumed_loose: list[str] | None = None) -> int:
    tables, read = [], []
    refs: dict[str, set[str]] = {}
    for path in paths:
        try:
            data = pq.read_table(path, filesystem=store.fs)
        except FileNotFoundError:
            continue  # merged by another consolidation
        tables.append(_newest_per_batch(data))
        for table, found in _schema_refs(data.schema.metadata).items():
            refs.setdefault(table, set()).update(found)
        read.append(path)
    if not tables:
        return 0
    rows = _newest_per_batch(pa.concat_tables([t.replace_schema_metadata(None) for t in tables]))
    digest = hashlib.sha256("\n".join(sorted(posixpath.basename(p) for p in read)).encode())
    target = posixpath.join(_dir(store, SEGMENTS_DIR), f"segment-{digest.hexdigest()[:32]}.parquet")
    meta = json.dumps({t: sorted(found) for t, found in refs.items()}).encode()
    rows = rows.replace_schema_metadata({SCHEMAS_KEY: meta})
    fs.atomic_write(store.fs, target, lambda fh: pq.write_table(rows, fh, row_group_size=1 << 20))
    # the batches now in the segment: their loose entries older than their seal go too
    sealed = _seal_times(rows)
    doomed = [p for p in read if p != target]
    for name in consumed_loose or []:
        batch_id, stamp = _loose_name_parts(name)
        if batch_id in sealed and stamp is not None and stamp <= sealed[batch_id] \
                and ".seal." not in name:
            doomed.append(posixpath.join(_dir(store, LOOSE_DIR), name))
    for path in doomed:
        try:
            store.fs.delete_file(path)
        except FileNotFoundError:
            pass
    return len(read)


def _loose_name_parts(name: str) -> tuple[str, int | None]:
    parts = name.split(".")
    batch_id = parts[0]
    try:
        stamp = int(parts[-2].split("-")[0])
    except (IndexError, ValueError):
        stamp = None
    return batch_id, stamp


def _seal_times(rows: pa.Table) -> dict[str, int]:
    """batch id -> sealed_at_ns of its record rows."""
    records = rows.filter(pc.equal(rows["table"], BATCH_ROW))
    out: dict[str, int] = {}
    for batch_id, text in zip(records["batch_id"].to_pylist(), records["record_json"].to_pylist()):
        stamp = int(json.loads(text).get("sealed_at_ns") or 0)
        out[batch_id] = max(out.get(batch_id, 0), stamp)
    return out


def _newest_per_batch(rows: pa.Table) -> pa.Table:
    """Only the newest seal of each batch. A seal is a run of rows ending in
    its record row (seals are written, and merged, as such runs), so when a
    file holds several seals of one batch the runs of the older ones go."""
    records = rows.filter(pc.equal(rows["table"], BATCH_ROW))
    if records.num_rows == len(set(records["batch_id"].to_pylist())):
        return rows  # one seal per batch: nothing to choose
    # several seals of a batch: seals are contiguous runs ending in their record row
    is_record = pc.equal(rows["table"], BATCH_ROW).to_numpy(zero_copy_only=False)
    batch = rows["batch_id"].to_pylist()
    texts = rows["record_json"].to_pylist()
    run_ends = np.flatnonzero(is_record)
    run_starts = np.concatenate([[0], run_ends[:-1] + 1])
    best: dict[str, tuple[int, int]] = {}
    for run, end in enumerate(run_ends):
        stamp = int(json.loads(texts[end]).get("sealed_at_ns") or 0)
        if batch[end] not in best or stamp >= best[batch[end]][0]:
            best[batch[end]] = (stamp, run)
    keep = np.zeros(rows.num_rows, dtype=bool)
    for _, run in best.values():
        keep[run_starts[run]:run_ends[run] + 1] = True
    return rows.filter(pa.array(keep))


def _unify(schemas: list[pa.Schema | None]) -> pa.Schema | None:
    found = [s for s in schemas if s is not None]
    if not found:
        return None
    return pa.unify_schemas(found, promote_options="permissive")


def rebuild(store) -> int:
    """Seal every finished batch from its files and consolidate: what a lost
    index needs (readers do the same batch by batch when they meet one).
    Returns the number of batches sealed."""
    sealed = 0
    for batch_id in store.batch_ids():
        if seal_batch(store, batch_id) is not None:
            sealed += 1
    consolidate(store, min_seals=1, merge_segments=1)
    return sealed

# -- reading (worker/store/index_reader.py) ------------------------------------

def read_index(store):
    """The store's read index, refreshed (``index_reader.ReadIndex``); None
    when SORBRANK_READ_INDEX=0. Also makes the store's table listings come
    from the index."""
    from .index_reader import read_index as refreshed
    return refreshed(store)


def main(argv: list[str] | None = None) -> int:
    """``python -m sorbrank.worker.store.index rebuild|consolidate --data-dir DIR``"""
    import argparse

    from .tables import Store
    parser = argparse.ArgumentParser(prog="python -m sorbrank.worker.store.index",
                                     description="Rebuild or consolidate a store's read index.")
    parser.add_argument("action", choices=("rebuild", "consolidate"))
    parser.add_argument("--data-dir", required=True)
    args = parser.parse_args(argv)
    store = Store(args.data_dir)
    if args.action == "rebuild":
        print(f"sealed {rebuild(store)} finished batch(es)")
    else:
        print(f"merged {consolidate(store, min_seals=1)} file(s)")
        from .compaction import compact
        print(f"compacted the summaries of {compact(store, min_batches=1)} batch(es)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

