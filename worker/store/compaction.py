"""Compacted summaries: the summaries of many finished batches merged into one
file, so that a process's first ranking opens a few files instead of one per
batch (10,000 per-batch files: 8.6 s for the ranking columns, one merged file
0.008 s; docs/benchmarks.md).

On disk, ``<root>/compacted/summaries/<sha256>.parquet``: the rows of the
batches' summaries files (declared schema plus their ``batch_id`` column),
each batch's rows in its files' order, and in the footer (``SOURCES_KEY``)
the files each batch's rows were copied from, as (file name, size,
modification time). The name is the hash of that list, so two compactions of
the same batches write the same file; a file is written atomically and
never rewritten, and a merge writes the merged file before it deletes the
ones it merged. Per-batch files stay: every other reader relies on them.

A ranking reads a batch from a compacted file only while the batch is
trusted by the read index (sealed, no re-run or quarantine since) and its
summaries files, as the listing the ranking uses finds them, are exactly
the ones the compacted file copied; any other batch (open, re-run,
quarantined, not compacted yet, or whose compacted file is gone) is read
from its own files. A batch in several compacted files (two compactions at
once) is read from one of them. So the rows are those of a full scan.
"""
from __future__ import annotations

import hashlib
import json
import logging
import posixpath
import threading
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from .. import fs

log = logging.getLogger(__name__)

COMPACTED_DIR = ("compacted", "summaries")
SOURCES_KEY = b"sorbrank.compacted.sources"
# batches not yet in a compacted file that make a new one worth its write
COMPACT_BATCHES = 200
# compacted files merged into one when there are more
MERGE_FILES = 8
# rows per row group: a ranking's page reads only the row groups holding its rows
ROW_GROUP_ROWS = 4096

Signature = tuple[tuple[str, int, int], ...]   # (file name, size, mtime_ns) per file


def folder(store) -> str:
    return str(store._join(*COMPACTED_DIR))


def _names(store) -> list[str]:
    try:
        infos = fs.list_dir(store.fs, folder(store))
    except FileNotFoundError:
        return []
    return sorted(i.base_name for i in infos if i.type == pafs.FileType.File
                  and i.base_name.endswith(".parquet") and not i.base_name.startswith((".", "_")))


def signatures(snap) -> dict[str, Signature]:
    """Per batch, its summaries files in ``snap`` (those a scan reads) as
    (name, size, mtime_ns); batches with a file of unknown size or time are
    left out (they cannot be told unchanged)."""
    stats = {path: (size, mtime) for path, size, mtime in snap.key}
    found: dict[str, list] = {}
    unknown = set()
    for fragment, batch_id in zip(snap.fragments, snap.batch_of_file):
        size, mtime = stats.get(fragment.path, (None, None))
        if batch_id is None or size is None or mtime is None:
            unknown.add(batch_id)
            continue
        found.setdefault(batch_id, []).append((posixpath.basename(fragment.path), size, mtime))
    return {b: tuple(sorted(files)) for b, files in found.items() if b not in unknown}


def _sources(metadata: dict | None) -> dict[str, Signature]:
    text = (metadata or {}).get(SOURCES_KEY)
    if text is None:
        return {}
    return {b: tuple(tuple(f) for f in files) for b, files in json.loads(text).items()}


def read_sources(store, path: str) -> dict[str, Signature]:
    """The batches a compacted file holds and the files each was copied from."""
    return _sources(pq.read_schema(path, filesystem=store.fs).metadata)


def _write(store, rows: pa.Table, sources: dict[str, Signature], metadata: dict) -> str:
    text = json.dumps({b: [list(f) for f in sources[b]] for b in sorted(sources)},
                      sort_keys=True)
    digest = hashlib.sha256(text.encode()).hexdigest()[:40]
    path = posixpath.join(folder(store), f"{digest}.parquet")
    if store.fs.get_file_info(path).type == pafs.FileType.File:
        return path  # the same batches from the same files: written already
    rows = rows.replace_schema_metadata({**metadata, SOURCES_KEY: text.encode()})
    store.fs.create_dir(folder(store), recursive=True)
    fs.atomic_write(store.fs, path, lambda fh: pq.write_table(
        rows, fh, row_group_size=ROW_GROUP_ROWS, write_page_checksum=True))
    return path


def _listed_signatures(store, listing) -> tuple[dict[str, Signature], dict[str, list[str]]]:
    """``signatures`` from a listing of the summaries (path, size, mtime_ns),
    and each batch's paths in listing order."""
    found: dict[str, list] = {}
    paths: dict[str, list[str]] = {}
    unknown = set()
    for path, size, mtime in listing:
        part = posixpath.basename(posixpath.dirname(path))
        if not part.startswith("batch_id="):
            continue
        batch_id = part.removeprefix("batch_id=")
        if size is None or mtime is None:
            unknown.add(batch_id)
        found.setdefault(batch_id, []).append((posixpath.basename(path), size, mtime))
        paths.setdefault(batch_id, []).append(path)
    return ({b: tuple(sorted(f)) for b, f in found.items() if b not in unknown},
            {b: p for b, p in paths.items() if b not in unknown})


def _batch_rows(store, paths: list[str], batch_id: str) -> pa.Table | None:
    """A batch's summaries rows with their batch_id, as a scan reads them;
    None when a file is damaged or gone (the batch stays per batch: the
    readers quarantine a damaged file)."""
    parts = []
    for path in paths:
        try:
            if store.verify_file(path, "summaries") is not None:
                return None
            data = pq.read_table(path, filesystem=store.fs, partitioning=None)
        except (OSError, pa.ArrowException):
            return None
        if "batch_id" in data.column_names:
            return None  # a file carrying its own batch_id: the scan reconciles it
        parts.append(data.append_column("batch_id", pa.array([batch_id] * data.num_rows,
                                                            pa.string())))
    return pa.concat_tables(parts, promote_options="permissive") if parts else None


def _index_of(store):
    """The store's read index, refreshed: the one its reads attached, or one
    kept for compaction only, so that a worker's own table listings stay
    directory listings (None with SORBRANK_READ_INDEX=0)."""
    from .index import enabled
    from .index_reader import ReadIndex
    if not enabled():
        return None
    index = getattr(store, "_read_index", None) or getattr(store, "_compaction_index", None)
    if index is None:
        index = store._compaction_index = ReadIndex(store)
    index.refresh()
    return index


def compact(store, min_batches: int = COMPACT_BATCHES, merge_files: int = MERGE_FILES) -> int:
    """Copy the summaries of trusted finished batches that no compacted file
    holds into a new one once there are ``min_batches`` of them; merge the
    compacted files into one once there are more than ``merge_files`` (what
    they hold that is still current: stale batches are dropped), deleting
    the merged files after the merged one is written. Returns the number of
    batches written. Needs the read index (with SORBRANK_READ_INDEX=0: 0)."""
    index = _index_of(store)
    if index is None:
        return 0
    current, batch_paths = _listed_signatures(store, index.listing("summaries"))
    trusted = {b for b in index.finished() if b in current}
    existing = {}
    for name in _names(store):
        path = posixpath.join(folder(store), name)
        try:
            existing[path] = read_sources(store, path)
        except FileNotFoundError:
            continue  # merged away by another compaction
        except (OSError, pa.ArrowException) as exc:
            log.warning("compacted file %s unreadable (%s): its batches are compacted again",
                        path, exc)
    covered = {b for sources in existing.values() for b, sig in sources.items()
               if current.get(b) == sig}
    pending = sorted(trusted - covered)
    written = 0
    metadata: dict = {}
    if pending and len(pending) >= min_batches:
        parts, sources = [], {}
        for batch_id in pending:
            rows = _batch_rows(store, batch_paths[batch_id], batch_id)
            if rows is not None:
                parts.append(rows)
                sources[batch_id] = current[batch_id]
        if parts:
            metadata = dict(parts[0].schema.metadata or {})
            rows = pa.concat_tables([p.replace_schema_metadata(None) for p in parts],
                                    promote_options="permissive")
            path = _write(store, rows, sources, metadata)
            existing[path] = sources
            written += len(sources)
    if len(existing) > merge_files:
        written += _merge(store, existing, current, trusted, metadata)
    return written


def _merge(store, existing: dict[str, dict[str, Signature]], current: dict[str, Signature],
           trusted: set[str], metadata: dict) -> int:
    parts, sources, read = [], {}, []
    for path in sorted(existing):
        keep = sorted(b for b, sig in existing[path].items()
                      if b in trusted and b not in sources and current.get(b) == sig)
        try:
            data = pq.read_table(path, filesystem=store.fs, page_checksum_verification=True)
        except FileNotFoundError:
            return 0  # another compaction merged them: its file holds the same
        read.append(path)
        if not metadata:  # from the table already read: another compaction may delete the file
            metadata = {k: v for k, v in (data.schema.metadata or {}).items() if k != SOURCES_KEY}
        if keep:
            parts.append(data.filter(pc.is_in(data["batch_id"], pa.array(keep, pa.string())))
                         .replace_schema_metadata(None))
            sources.update({b: existing[path][b] for b in keep})
    target = None
    if parts:
        rows = pa.concat_tables(parts, promote_options="permissive")
        target = _write(store, rows, sources, metadata)
    for path in read:
        if path == target:
            continue
        try:
            store.fs.delete_file(path)
        except FileNotFoundError:
            pass
    return len(sources)


def compact_quietly(store) -> int:
    """``compact`` for a job: a failure is logged, never raised."""
    try:
        return compact(store)
    except (OSError, pa.ArrowException) as exc:
        log.warning("compaction of summaries failed (%s); it is tried again", exc)
        return 0


# -- reading ------------------------------------------------------------------

class KeySource:
    """The ranking columns of every summaries row a full scan would read,
    taken from compacted files where they may be and from per-batch files
    otherwise: per row its column values, file number, row in that file and
    batch id; ``snapshot`` lists the files by those numbers (for the page's
    whole rows)."""

    def __init__(self, columns: dict[str, pa.Array], file_of_row: np.ndarray,
                 row_in_file: np.ndarray, batch_of_row: pa.Array, snapshot):
        self.columns, self.file_of_row, self.row_in_file = columns, file_of_row, row_in_file
        self.batch_of_row, self.snapshot = batch_of_row, snapshot


class _View:
    """For one (index version, compacted files): which batch comes from
    which compacted file, the per-batch files of the others, and the
    columns assembled so far."""

    def __init__(self, key, compacted: list[tuple[str, np.ndarray, pa.Array]], rest):
        self.key = key
        self.compacted = compacted  # (path, rows used, their batch ids)
        self.rest = rest            # TableSnapshot of the per-batch files read directly
        self.combined: Any = None   # TableSnapshot over compacted + rest files
        self.columns: dict[str, pa.Array] = {}


class _Columns:
    """What a combined snapshot's ``key_columns`` asks (TableSnapshot.index)."""

    def __init__(self, reader: "_Reader", view: _View):
        self.reader, self.view = reader, view

    def key_columns(self, snap, names: list[str]) -> dict[str, pa.Array]:
        return self.reader.assembled(self.view, names).columns


class _Reader:
    def __init__(self):
        from .tables import _TableIndex
        self.lock = threading.Lock()
        self.view: _View | None = None
        self.file_columns: dict[str, dict[str, pa.Array]] = {}   # compacted path -> columns
        self.file_sources: dict[str, dict[str, Signature]] = {}
        # the per-batch files read directly: kept as the store keeps a table's
        self.rest_index = _TableIndex("summaries")

    def snapshot(self, store, index):
        paths = [posixpath.join(folder(store), n) for n in _names(store)]
        with self.lock:
            if not paths:
                self.view = None
                return None
            key = (tuple(paths), index.version, id(index))
            view = self.view
            if view is None or view.key != key:
                view = self.view = self._view(store, index, paths, key)
            return None if view is None else view.combined

    def _view(self, store, index, paths, key) -> _View | None:
        from .tables import TableSnapshot
        for gone in set(self.file_sources) - set(paths):
            self.file_sources.pop(gone, None)
            self.file_columns.pop(gone, None)
        listing = index.listing("summaries")
        current, _ = _listed_signatures(store, listing)
        trusted = index.finished()
        taken: set[str] = set()
        compacted = []
        fmt = ds.ParquetFileFormat()
        fragments, schemas = [], []
        for path in paths:
            try:
                if path not in self.file_sources:
                    self.file_sources[path] = read_sources(store, path)
                    self.file_columns[path] = {}
                usable = sorted(b for b, sig in self.file_sources[path].items()
                                if b not in taken and b in trusted and current.get(b) == sig)
                if not usable:
                    continue
                ids = self._column(store, path, "batch_id")
                fragment = fmt.make_fragment(path, store.fs)
                fragment.ensure_complete_metadata()
            except (OSError, pa.ArrowException) as exc:
                if not isinstance(exc, FileNotFoundError):
                    log.warning("compacted file %s unreadable (%s): read per batch", path, exc)
                self.file_sources.pop(path, None)
                self.file_columns.pop(path, None)
                continue
            taken.update(usable)
            mask = pc.is_in(ids, pa.array(usable, pa.string())).to_numpy(zero_copy_only=False)
            rows = np.flatnonzero(mask)
            compacted.append((path, rows, ids.take(pa.array(rows))))
            fragments.append(fragment)
            schema = fragment.physical_schema
            schemas.append(schema.with_metadata({k: v for k, v in (schema.metadata or {}).items()
                                                 if k != SOURCES_KEY}))
        if not compacted:
            return None
        base = str(store._join("summaries"))
        rest_listing = [e for e in listing if _batch_of_path(e[0]) not in taken]
        with self.rest_index.lock:
            rest = self.rest_index._snapshot(store, base, rest_listing, tuple(rest_listing))
        if rest.own_batch_column:
            return None  # a file carrying its own batch_id: the full scan reconciles it
        view = _View(key, compacted, rest)
        every = fragments + rest.fragments
        physical = schemas + [f.physical_schema for f in rest.fragments]
        schema = pa.unify_schemas(physical[len(fragments):] + physical[:len(fragments)]
                                  + [pa.schema([("batch_id", pa.string())])],
                                  promote_options="permissive")
        # the page's whole rows: page checksums verified, as the table reads verify theirs
        verified = ds.ParquetFileFormat(default_fragment_scan_options=ds.ParquetFragmentScanOptions(
            page_checksum_verification=True))
        data = ds.FileSystemDataset(every, schema, verified, store.fs)
        view.combined = TableSnapshot(("compacted", key), data, every,
                                      [None] * len(fragments) + rest.batch_of_file, False, {},
                                      _Columns(self, view))  # type: ignore[arg-type]
        return view

    def _column(self, store, path: str, name: str) -> pa.Array:
        held = self.file_columns[path]
        if name not in held:
            column = pq.read_table(path, filesystem=store.fs, columns=[name],
                                   page_checksum_verification=True)[name]
            held[name] = column.combine_chunks()
        return held[name]

    def assembled(self, view: _View, names: list[str]) -> KeySource:
        schema = view.combined.dataset.schema
        store_fs = view.combined.dataset.filesystem
        with self.lock:
            todo = [n for n in names if n not in view.columns]
            rest_columns = view.rest.key_columns(todo) if todo and view.rest.dataset is not None \
                else {}
            for name in todo:
                parts = []
                for path, rows, _ in view.compacted:
                    held = self.file_columns.setdefault(path, {})
                    if name not in held:
                        column = pq.read_table(path, filesystem=store_fs, columns=[name],
                                           page_checksum_verification=True)[name]
                        held[name] = column.combine_chunks()
                    parts.append(held[name].take(pa.array(rows)))
                if name in rest_columns:
                    parts.append(rest_columns[name])
                field = schema.field(name)
                view.columns[name] = pa.concat_arrays(
                    [p if p.type.equals(field.type) else p.cast(field.type) for p in parts])
            n_compacted = len(view.compacted)
            files = [np.full(len(rows), i, dtype=np.int64) for i, (_, rows, _) in
                     enumerate(view.compacted)]
            rows_in = [rows.astype(np.int64) for _, rows, _ in view.compacted]
            batches = [ids for _, _, ids in view.compacted]
            if view.rest.dataset is not None:
                if view.rest.lengths is None:
                    view.rest.key_columns([names[0]])
                lengths = view.rest.lengths
                rest_files = np.repeat(np.arange(len(lengths), dtype=np.int64), lengths)
                files.append(rest_files + n_compacted)
                rows_in.extend(np.arange(n, dtype=np.int64) for n in lengths)
                batches.append(pa.array(view.rest.batch_of_file, pa.string()).take(
                    pa.array(rest_files)))
            return KeySource({n: view.columns[n] for n in names}, np.concatenate(files),
                             np.concatenate(rows_in), pa.concat_arrays(batches), view.combined)


def _batch_of_path(path: str) -> str | None:
    part = posixpath.basename(posixpath.dirname(path))
    return part.removeprefix("batch_id=") if part.startswith("batch_id=") else None


_READERS_LOCK = threading.Lock()


def snapshot(store):
    """The summaries as the rankings read them through compacted files: a
    TableSnapshot over the compacted files (the rows of the batches they
    may give) and the per-batch files of every other batch; None where no
    compacted file applies (no read index attached, SORBRANK_READ_INDEX=0,
    none written, none current). Its files are not the table's: only
    ``key_source`` and the page's whole rows read them."""
    from .index import enabled
    index = getattr(store, "_read_index", None)
    if index is None or not enabled():
        return None
    index.refresh()
    with _READERS_LOCK:
        reader = getattr(store, "_compacted_reader", None)
        if reader is None:
            reader = store._compacted_reader = _Reader()
    return reader.snapshot(store, index)


def is_compacted(snap) -> bool:
    return isinstance(snap.index, _Columns)


def key_source(snap, names: list[str]) -> KeySource | None:
    """The ranking columns ``names`` of a ``snapshot``'s rows (None for
    another snapshot)."""
    if not is_compacted(snap):
        return None
    return snap.index.reader.assembled(snap.index.view, names)
