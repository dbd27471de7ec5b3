"""The data tables: chunk files written and read whole, the listing of a
table's files kept between queries, and the quarantine of damaged files."""
from __future__ import annotations

import logging
import os
import posixpath
import re
import threading
from dataclasses import dataclass, replace
from pathlib import PurePath, PurePosixPath
from typing import Callable, NamedTuple

import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from .. import fs
from .layout import (SCHEMA_VERSION, SCHEMA_VERSION_KEY, TABLES, DamagedFile, StoreError,
                     StoreLayout, _check_batch_id, _short, is_batch_id, iso_utc, utc_now,
                     older_version_error, version_1_error)
from .records import FAILED, QUEUED, ChunkStatus
from .schema import conform

_PARTITIONING = ds.partitioning(pa.schema([("batch_id", pa.string())]), flavor="hive")
_INDEX_LOCK = threading.Lock()

# columns whose type every reader relies on; a file that stores another type is damaged
CORE_COLUMN_TYPES = {"isotherm_id": pa.string(), "sorbent_id": pa.string(),
                     "adsorbate": pa.string(), "temperature_k": pa.float64(),
                     "branch": pa.string(), "model": pa.string()}
QUARANTINE_DIR = "quarantine"
_CHUNK_FILE_PATTERN = re.compile(r"^chunk-([0-9]{5})\.parquet$")

log = logging.getLogger(__name__)


class Store(StoreLayout):
    """The store under ``root``: a local path, a URI pyarrow.fs understands, or
    a path inside an explicitly given ``filesystem``."""

    def __init__(self, root: str | os.PathLike, filesystem: pafs.FileSystem | None = None):
        super().__init__(root, filesystem)
        # rankings: fragments and schema of the summaries, kept between queries
        self._summaries_index = _TableIndex("summaries")
        self._indexes: dict[str, _TableIndex] = {}  # the other tables, made on first use
        # table -> sorted [(path, size, mtime_ns)] of its files, or None to list the directory
        self.listing_source: Callable[[str], list | None] | None = None

    # tables
    def write_table(self, table: str, batch_id: str, chunk_index: int, data: pa.Table) -> PurePath:
        """Write one chunk file of ``table``, conformed to its declared schema
        (``schema.conform``: SchemaMismatch for a column it does not declare);
        the partition directory carries the batch id. StoreError on a store at
        an older schema version."""
        path = self.table_path(table, batch_id, chunk_index)
        data = conform(table, data)
        self.ensure_current_schema()
        # page checksums: a flipped byte is found when the file is verified, not read as a number
        fs.atomic_write(self.fs, str(path),
                        lambda fh: pq.write_table(data, fh, write_page_checksum=True))
        return path

    def read_chunk(self, table: str, batch_id: str, chunk_index: int) -> pa.Table:
        """One chunk file, read whole; DamagedFile (after quarantining it) when it
        cannot be read, and when it was quarantined before."""
        path = self.table_path(table, batch_id, chunk_index)
        try:
            data = pq.read_table(str(path), filesystem=self.fs, partitioning=None,
                                 page_checksum_verification=True)
        except FileNotFoundError:
            earlier = [d for d in self.damaged_files(batch_id)
                       if d["table"] == table and d["chunk"] == chunk_index]
            if earlier:
                raise DamagedFile(f"{table} file of chunk {chunk_index} of batch {batch_id} is "
                                  f"damaged ({earlier[-1]['reason']}); it was moved to "
                                  f"{earlier[-1]['file']}") from None
            raise
        except (OSError, pa.ArrowException) as exc:
            if fs.out_of_space(exc):
                raise
            record = self.quarantine(str(path), _short(exc))
            raise DamagedFile(f"{table} file of chunk {chunk_index} of batch {batch_id} is "
                              f"damaged ({record['reason']}); it was moved to "
                              f"{record['file']}") from None
        version = (data.schema.metadata or {}).get(SCHEMA_VERSION_KEY, b"?").decode()
        if version == "1":
            raise version_1_error(str(path), self.root)
        if version == "2":
            raise older_version_error(str(path), self.root)
        if version != SCHEMA_VERSION:
            raise StoreError(f"{path}: schema version {version}, this code reads {SCHEMA_VERSION}")
        return data

    # damaged files
    def verify_file(self, path: str, table: str) -> str | None:
        """Why the data file ``path`` is damaged (None = it reads whole, page
        checksums match where it has them, and its key columns have their types)."""
        try:
            data = pq.read_table(path, filesystem=self.fs, partitioning=None,
                                 page_checksum_verification=True)
        except (OSError, pa.ArrowException) as exc:
            if fs.out_of_space(exc) or isinstance(exc, FileNotFoundError):
                raise
            return _short(exc)
        if SCHEMA_VERSION_KEY not in (data.schema.metadata or {}):
            return "no sorbrank schema version: not a file this store wrote"
        for name, expected in CORE_COLUMN_TYPES.items():
            if name in data.schema.names and not (
                    data.schema.field(name).type.equals(expected)
                    or pa.types.is_null(data.schema.field(name).type)):
                return f"column {name!r} is {data.schema.field(name).type}, expected {expected}"
        return None

    def quarantine(self, path: str, reason: str) -> dict:
        """Move the damaged data file ``path`` to ``quarantine/<batch id>/`` with a
        record of why, log it, and mark its chunk: a results file's chunk reads
        as queued again (its inputs fit it anew: the embedded watch or the Celery
        broker watch queues it), an inputs file's chunk as failed (nothing can
        refit it). Returns the record; another process that moved it first wins."""
        relative = posixpath.relpath(path, self.base)
        table, part, name = PurePosixPath(relative).parts[-3:]
        batch_id, chunk = part.removeprefix("batch_id="), _CHUNK_FILE_PATTERN.fullmatch(name)
        if table not in TABLES or not is_batch_id(batch_id) or chunk is None:
            raise ValueError(f"not a chunk file of the store: {path}")
        chunk_index = int(chunk.group(1))
        now = utc_now()
        stem = f"{table}.chunk-{chunk_index:05d}.{now:%Y%m%dT%H%M%S%fZ}"
        folder = self._join(QUARANTINE_DIR, batch_id)
        record = {"batch_id": batch_id, "table": table, "chunk": chunk_index, "reason": reason,
                  "quarantined_at": iso_utc(now), "from": relative,
                  "file": posixpath.join(QUARANTINE_DIR, batch_id, f"{stem}.parquet")}
        self.fs.create_dir(str(folder), recursive=True)
        try:
            self.fs.move(path, str(folder / f"{stem}.parquet"))
        except FileNotFoundError:
            return record  # quarantined by another reader a moment ago
        self._write_json(folder / f"{stem}.json", record)
        log.error("quarantined damaged file %s (%s): moved to %s", relative, reason,
                  record["file"], extra={"batch_id": batch_id, "chunk": chunk_index,
                                         "outcome": "quarantined"})
        self._mark_damaged_chunk(record)
        return record

    def _mark_damaged_chunk(self, record: dict) -> None:
        batch_id, chunk_index = record["batch_id"], record["chunk"]
        found = self.read_chunk_statuses(batch_id).get(chunk_index)
        status = None if found is None else ChunkStatus.from_dict(found)
        if status is None or not status.settled:
            return  # not settled yet: its run writes the file again
        if record["table"] == "inputs":
            status = replace(status, state=FAILED, done=0, error=(
                f"DamagedFile: the inputs file is damaged ({record['reason']}) "
                f"and was moved to {record['file']}; the chunk cannot be refitted"))
        else:
            status = ChunkStatus(QUEUED, attempts=0, refit_after_damage=record["file"])
        self.write_chunk_status(batch_id, chunk_index, status.to_dict())
        try:  # the batch is unfinished again (or settled differently): final.json is rewritten
            self.fs.delete_file(str(self.batch_dir(batch_id) / "final.json"))
        except FileNotFoundError:
            pass

    def damaged_files(self, batch_id: str) -> list[dict]:
        """The quarantine records of one batch, oldest first."""
        folder = self._join(QUARANTINE_DIR, _check_batch_id(batch_id))
        names = sorted(i.base_name for i in fs.list_dir(self.fs, str(folder))
                       if i.base_name.endswith(".json") and not i.base_name.startswith("."))
        records = [self._read_json(folder / name) for name in names]
        return sorted((r for r in records if r), key=lambda r: r["quarantined_at"])

    def quarantined_count(self) -> int:
        """Files moved to quarantine, over every batch."""
        return sum(1 for i in fs.list_dir(self.fs, str(self._join(QUARANTINE_DIR)), recursive=True)
                   if i.base_name.endswith(".parquet") and not i.base_name.startswith("."))

    def dataset(self, table: str, batch_id: str | None = None) -> ds.Dataset | None:
        """Chunks of ``table`` across batches (or of one batch), schemas unified.

        Only accepted batches (manifest on disk) and verified files: a damaged
        one is quarantined on first sight. None when there are no data files
        yet; StoreError on a version-1 store.
        """
        if table not in TABLES:
            return None
        self._refuse_version_1()
        if batch_id is not None:
            _check_batch_id(batch_id)
        snap = self.snapshot(table)
        if batch_id is None:
            return snap.dataset
        fragments = [f for f, b in zip(snap.fragments, snap.batch_of_file) if b == batch_id]
        return _dataset_of(self, fragments)

    def snapshot(self, table: str) -> TableSnapshot:
        """``table``'s files as listed now, verified, with their dataset (kept
        between calls; unlike ``dataset``, no check for a version-1 store)."""
        return self._index(table).current(self)

    def _index(self, table: str) -> "_TableIndex":
        if table == "summaries":
            return self._summaries_index
        with _INDEX_LOCK:
            return self._indexes.setdefault(table, _TableIndex(table))

    def query(self, table: str, where: ds.Expression | None = None) -> pa.Table:
        data = self.dataset(table)
        if data is None:
            return pa.table({})
        return data.to_table(filter=where)

    def batch_table(self, table: str, batch_id: str) -> pa.Table:
        data = self.dataset(table, batch_id)
        return pa.table({}) if data is None else data.to_table()

class _FileEntry(NamedTuple):
    """One data file of a table as the listing last saw it."""

    size: int | None
    mtime_ns: int | None
    fragment: ds.ParquetFileFragment
    batch_id: str | None           # its partition value
    own_batch_column: bool         # the file stores a batch_id column itself


@dataclass
class TableSnapshot:
    """The table's files as one listing found them."""

    key: tuple
    dataset: ds.Dataset | None
    fragments: list
    batch_of_file: list            # partition value (batch id) of each fragment
    own_batch_column: bool         # some file stores a batch_id column itself
    combined: dict                 # column name -> array over every file, file order
    index: "_TableIndex"           # what keeps the columns between listings
    lengths: np.ndarray | None = None

    def key_columns(self, names: list[str]) -> dict[str, pa.Array]:
        """``names`` over every file of the snapshot, in its file and row order
        (each file's columns read once, when it first appears)."""
        return self.index.key_columns(self, names)


class _TableIndex:
    """One table's data files across batches, kept between queries.

    Every use lists the table's directory again (one recursive listing, no
    file opened); a file's footer is read only when the file is new or its
    size or modification time changed (a retried job renames a new file over
    its old one), so queries over an unchanged store read no footers and new
    chunk files are seen by the next query. The dataset built from that
    listing equals what ``Store.dataset`` discovers: same files (dot- and
    underscore-names skipped, unreadable files left out), same partition
    values, same permissively unified schema.

    For rankings it also keeps a few columns of every file in memory (about
    100 bytes per summary row for the key columns): files never change once
    written, so each is read once, when it first appears.
    """

    def __init__(self, table: str):
        self.table = table
        self.lock = threading.Lock()
        self.files: dict[str, _FileEntry] = {}    # path -> what the listing last saw
        self.snapshot: TableSnapshot | None = None
        # kept columns per file (slices of the snapshot's combined arrays),
        # read with ``column_schema``
        self.columns: dict[str, dict[str, pa.Array]] = {}
        self.column_schema: pa.Schema | None = None

    def current(self, store: "Store") -> TableSnapshot:
        base = str(store._join(self.table))
        # a read index (worker/store/index.py) knows the files without a listing
        listing = None if store.listing_source is None else store.listing_source(self.table)
        if listing is None:
            listing = self._listed(store, base)
        key = tuple(listing)
        with self.lock:
            return self._snapshot(store, base, listing, key)

    def _listed(self, store: "Store", base: str) -> list[tuple[str, int | None, int | None]]:
        infos = fs.list_dir(store.fs, base, recursive=True)
        listing = []
        prefix = base.rstrip("/") + "/"
        for info in infos:
            if info.type != pafs.FileType.File:
                continue
            relative = info.path[len(prefix):] if info.path.startswith(prefix) else \
                posixpath.relpath(info.path, base)
            parts = relative.split("/")
            if any(part.startswith((".", "_")) for part in parts):
                continue
            # inputs of a batch without a manifest (an acceptance that failed or
            # is still writing) are no batch's data yet; results follow a manifest
            if self.table == "inputs" and parts[0].startswith("batch_id=") and not store.is_accepted(
                    parts[0].removeprefix("batch_id=")):
                continue
            listing.append((info.path, info.size, info.mtime_ns))
        listing.sort()
        return listing

    def _snapshot(self, store: "Store", base: str, listing: list, key: tuple) -> TableSnapshot:
        if self.snapshot is not None and self.snapshot.key == key and None not in (
                m for _, _, m in listing):
            return self.snapshot
        fmt = ds.ParquetFileFormat()
        files = {}
        for path, size, mtime_ns in listing:
            known = self.files.get(path)
            if known is not None and (known.size, known.mtime_ns) == (size, mtime_ns) \
                    and mtime_ns is not None:
                files[path] = known
                continue
            # parse() reads the directories of a path relative to the table
            relative = posixpath.relpath(path, base)
            try:
                # read whole once, when first seen: a damaged file is moved
                # aside here, before any query can trip over it
                damage = store.verify_file(path, self.table)
                if damage is None:
                    fragment = fmt.make_fragment(
                        path, store.fs, partition_expression=_PARTITIONING.parse(relative))
                    fragment.ensure_complete_metadata()  # footer read once, kept
                    names = fragment.physical_schema.names
            except FileNotFoundError:
                continue  # replaced or moved since the listing: the next query sees it
            except (OSError, pa.ArrowException, ValueError) as exc:
                damage = _short(exc)
            if damage is not None:
                _quarantine_quietly(store, path, damage)
                continue
            files[path] = _FileEntry(
                size, mtime_ns, fragment,
                ds.get_partition_keys(fragment.partition_expression).get("batch_id"),
                "batch_id" in names)
        _drop_clashing_types(store, files, [p for p, _, _ in listing])
        for path in set(self.files) - set(files) | {
                p for p in files if self.files.get(p) is not files[p]}:
            for cached in self.columns.values():  # gone or replaced: read again
                cached.pop(path, None)
        self.files = files
        kept = [files[path] for path, _, _ in listing if path in files]
        fragments = [k.fragment for k in kept]
        dataset = _dataset_of(store, fragments)
        self.snapshot = TableSnapshot(key, dataset, fragments, [k.batch_id for k in kept],
                                      any(k.own_batch_column for k in kept), {}, self)
        return self.snapshot

    def key_columns(self, snap: TableSnapshot, names: list[str]) -> dict[str, pa.Array]:
        """``names`` over every file of the snapshot, in its file and row order."""
        dataset, fragments = snap.dataset, snap.fragments
        assert dataset is not None, "a snapshot whose files are read has a dataset"
        with self.lock:
            if self.column_schema is None or not self.column_schema.equals(dataset.schema):
                self.columns = {}  # a type was widened by a new file: read everything again
                self.column_schema = dataset.schema
            todo = [n for n in names if n not in snap.combined]
            for name in todo:
                self.columns.setdefault(name, {})
            missing = [f for f in fragments if any(f.path not in self.columns[n] for n in todo)]
            if missing:
                scan = ds.FileSystemDataset(missing, dataset.schema, dataset.format,
                                            dataset.filesystem)
                table = scan.to_table(columns=todo + ["__fragment_index"])
                which = table["__fragment_index"].to_numpy()
                if len(which) and np.any(np.diff(which) < 0):  # not in file order: one by one
                    parts = [f.to_table(columns=todo, schema=dataset.schema) for f in missing]
                else:
                    ends = np.searchsorted(which, np.arange(len(missing)), side="right")
                    starts = np.concatenate([[0], ends[:-1]]).astype(np.int64)
                    parts = [table.slice(a, b - a) for a, b in zip(starts, ends)]
                for fragment, part in zip(missing, parts):
                    for name in todo:
                        self.columns[name][fragment.path] = part[name].combine_chunks()
            for name in todo:
                arrays = [self.columns[name][f.path] for f in fragments]
                if snap.lengths is None:
                    snap.lengths = np.array([len(a) for a in arrays], dtype=np.int64)
                combined = pa.concat_arrays(arrays) if arrays else \
                    pa.array([], dataset.schema.field(name).type)
                # each file's entry becomes a view of the combined array: kept once
                offset = 0
                for fragment, size in zip(fragments, snap.lengths):
                    self.columns[name][fragment.path] = combined.slice(offset, size)
                    offset += size
                snap.combined[name] = combined
            return {name: snap.combined[name] for name in names}


def _quarantine_quietly(store: "Store", path: str, reason: str) -> None:
    try:
        store.quarantine(path, reason)
    except (OSError, ValueError):  # left in place: the next query tries again
        log.exception("could not quarantine damaged file %s (%s)", path, reason)


def _drop_clashing_types(store: "Store", files: dict, order: list[str]) -> None:
    """Quarantine each file whose column types cannot merge with those of the
    files before it (older batches first): one file with a wrong type must not
    make the whole table unreadable."""
    schema = _PARTITIONING.schema
    for path in order:
        if path not in files:
            continue
        try:
            schema = pa.unify_schemas([schema, files[path].fragment.physical_schema],
                                      promote_options="permissive")
        except (pa.ArrowException, ValueError) as exc:
            del files[path]
            _quarantine_quietly(store, path, f"column types clash with the store's: {_short(exc)}")


def _dataset_of(store: "Store", fragments: list) -> ds.Dataset | None:
    """The fragments as one dataset, their schemas unified (None without data)."""
    if not fragments:
        return None
    schemas = [f.physical_schema for f in fragments] + [_PARTITIONING.schema]
    schema = pa.unify_schemas(schemas, promote_options="permissive")
    store._refuse_version_1(schema)
    if len(schema) <= 1:
        return None
    return ds.FileSystemDataset(fragments, schema, ds.ParquetFileFormat(), store.fs)


