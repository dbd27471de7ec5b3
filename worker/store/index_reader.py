"""The read index as one process reads it: which batches it trusts from their
seals, which it reads from their files, and the lookups the reads make. The
rules are in ``index.py``'s module text; this is their reader."""
from __future__ import annotations

import json
import os
import posixpath
import threading
import time
from dataclasses import dataclass, field
from datetime import datetime

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from .. import fs
from .index import (BATCH_ROW, LOOSE_DIR, SEGMENTS_DIR, TABLES, _chunk_of, _dir, _empty_rows,
                    _loose_name_parts, _names, _newest_per_batch, _read_key_rows,
                    _schemas_from, _unify, enabled, seal_batch)
from .layout import is_batch_id

# how often a store without cheap directory listings (object stores) is checked
# for batches no entry announced
RECHECK_S = 30.0
# a local directory's modification time is trusted once it is this old (seconds)
SETTLED_S = 2.0

@dataclass
class _Part:
    """One index file as read: its rows and, per batch, the newest record."""

    rows: pa.Table
    schemas: dict[str, pa.Schema]
    records: dict[str, dict]                 # batch id -> record (seals)
    kind: str                                # "seal" (seals, segments) or "entry"
    stamp: int                               # entry: when written (ns)
    batches: set[str] = field(default_factory=set)
    keys: pa.Table | None = None             # rows without the batch records (seals)


class ReadIndex:
    """One process's view of the index of one store (see the module text)."""

    def __init__(self, store):
        self.store = store
        self.lock = threading.RLock()
        self.parts: dict[str, _Part] = {}            # index file path -> its contents
        # open batch -> (its rows, schemas, files) as its directories list them
        self.examined: dict[str, tuple[pa.Table, dict, tuple]] = {}
        self.file_cache: dict[str, tuple] = {}       # data path -> (size, mtime, rows, schema)
        self.known_batches: set[str] = set()
        self.open: set[str] = set()
        self.records: dict[str, dict] = {}
        self.quarantine_seen: dict[str, int] = {}    # batch id -> quarantine records seen
        self.changed_at: dict[str, int] = {}         # batch id -> newest loose entry / damage
        self.last_full_check = 0.0
        self.waiting: set[str] = set()              # batch directories without a manifest yet
        self.dir_times: dict[str, int | None] = {}  # local directory -> mtime at the last look
        self.parts_loaded = False
        self.version = 0
        self._finished: dict[str, dict] | None = None
        self._unfinished: list[str] | None = None
        self._batch_ids: list[str] | None = None
        self._combined: pa.Table | None = None
        self._listings: dict[str, list] = {}
        self._schemas: dict[str, pa.Schema | None] = {}

    # refresh ---------------------------------------------------------------
    def refresh(self) -> None:
        with self.lock:
            changed = self._load_parts()
            changed |= self._discover()
            changed |= self._check_quarantine()
            # which batches are open changes only with what was just read
            opened = self._open_batches() if changed or self._combined is None else self.open
            if opened != self.open:
                changed = True
                for gone in self.open - opened:
                    self.examined.pop(gone, None)
                self.open = opened
            changed |= self._examine_open()
            if changed or self._combined is None:
                self._rebuild_views()

    def _unchanged(self, path: str) -> bool:
        """True when the local directory ``path`` is as at the last look: its
        modification time is the same and older than ``SETTLED_S`` (a change
        within the same clock tick as the last look cannot hide). Elsewhere
        (object stores have no directory times) always False."""
        if not fs.is_local(self.store.fs):
            return False
        try:
            mtime_ns = os.stat(path).st_mtime_ns
        except FileNotFoundError:
            mtime_ns = -1
        settled = mtime_ns < time.time_ns() - int(SETTLED_S * 1e9)
        same = self.dir_times.get(path) == mtime_ns
        self.dir_times[path] = mtime_ns if settled else None
        return same and settled

    def _load_parts(self) -> bool:
        loose_dir, seg_dir = _dir(self.store, LOOSE_DIR), _dir(self.store, SEGMENTS_DIR)
        if self.parts_loaded and self._unchanged(loose_dir) & self._unchanged(seg_dir):
            return False
        self.parts_loaded = True
        for attempt in range(3):
            # loose before segments: a consolidation writes its segment before it deletes
            wanted = [posixpath.join(loose_dir, n) for n in _names(self.store, loose_dir)]
            wanted += [posixpath.join(seg_dir, n) for n in _names(self.store, seg_dir)]
            changed = False
            try:
                for path in wanted:
                    if path not in self.parts:
                        self.parts[path] = self._read_part(path)
                        changed = True
            except FileNotFoundError:
                continue  # consolidated away since the listing: list again
            for path in set(self.parts) - set(wanted):
                del self.parts[path]
                changed = True
            if changed:
                self._recompute_batches()
            return changed
        return False

    def _read_part(self, path: str) -> _Part:
        data = pq.read_table(path, filesystem=self.store.fs)
        schemas = _schemas_from(self.store, data.schema.metadata)
        data = data.replace_schema_metadata(None)
        name = posixpath.basename(path)
        batches = set(pc.unique(data["batch_id"]).to_pylist())
        if ".seal." in name or name.startswith("segment-"):
            data = _newest_per_batch(data)
            records = {}
            recs = data.filter(pc.equal(data["table"], BATCH_ROW))
            for batch_id, text in zip(recs["batch_id"].to_pylist(),
                                      recs["record_json"].to_pylist()):
                records[batch_id] = json.loads(text)
            return _Part(data, schemas, records, "seal", 0, batches)
        _, stamp = _loose_name_parts(name)
        return _Part(data, schemas, {}, "entry", stamp or 0, batches)

    def _recompute_batches(self) -> None:
        records: dict[str, dict] = {}
        changed_at: dict[str, int] = {}
        for path, part in self.parts.items():
            for batch_id, record in part.records.items():
                held = records.get(batch_id)
                if held is None or (record.get("sealed_at_ns") or 0, path) > (
                        held.get("sealed_at_ns") or 0, held["_from"]):
                    records[batch_id] = {**record, "_from": path}
            if part.kind == "entry":
                for batch_id in part.batches:
                    changed_at[batch_id] = max(changed_at.get(batch_id, 0), part.stamp)
                    self.known_batches.add(batch_id)
        self.records = records
        self.known_batches |= set(records)
        for batch_id, stamp in changed_at.items():
            self.changed_at[batch_id] = max(self.changed_at.get(batch_id, 0), stamp)

    def _discover(self) -> bool:
        """Batches on disk that no index file names: open (read from files)."""
        local = fs.is_local(self.store.fs)
        now = time.monotonic()
        if not local and now - self.last_full_check < RECHECK_S:
            return False
        self.last_full_check = now
        folder = str(self.store._join("batches"))
        # a batch directory whose manifest is still being written is looked at again
        waiting = {b for b in self.waiting if self.store.is_accepted(b)}
        self.waiting -= waiting
        self.known_batches |= waiting
        if self._unchanged(folder):
            return bool(waiting)
        if local:
            try:
                names = os.listdir(folder)
            except FileNotFoundError:
                names = []
        else:
            names = [i.base_name for i in fs.list_dir(self.store.fs, folder)
                     if i.type == pafs.FileType.Directory]
        new = {n for n in names if is_batch_id(n)} - self.known_batches
        accepted = {b for b in new if self.store.is_accepted(b)}
        self.waiting |= new - accepted
        self.known_batches |= accepted
        return bool(accepted or waiting)

    def _check_quarantine(self) -> bool:
        """A damaged file moved aside after a batch was sealed reopens it."""
        folder = str(self.store._join("quarantine"))
        if fs.is_local(self.store.fs) and not os.path.isdir(folder):
            return False
        try:
            entries = fs.list_dir(self.store.fs, folder)
        except OSError:
            return False
        changed = False
        for info in entries:
            batch_id = info.base_name
            if info.type != pafs.FileType.Directory or not is_batch_id(batch_id):
                continue
            if self._unchanged(info.path):
                continue
            records = self.store.damaged_files(batch_id) if batch_id in self.records or \
                batch_id in self.known_batches else []
            if len(records) == self.quarantine_seen.get(batch_id, 0):
                continue
            self.quarantine_seen[batch_id] = len(records)
            for record in records:
                stamp = _iso_ns(record.get("quarantined_at"))
                if stamp > self.changed_at.get(batch_id, 0):
                    self.changed_at[batch_id] = stamp
                    changed = True
        return changed

    def _open_batches(self) -> set[str]:
        opened = set()
        for batch_id in self.known_batches:
            record = self.records.get(batch_id)
            if record is None or self.changed_at.get(batch_id, 0) > (record.get("sealed_at_ns") or 0):
                opened.add(batch_id)
        return opened

    def _examine_open(self) -> bool:
        """Open batches from their files (opened only when new or changed);
        finished ones are sealed on the way, so no reader lists them again."""
        changed = sealed = False
        entries = [p for p in self.parts.values() if p.kind == "entry"]
        for batch_id in sorted(self.open):
            folders = [str(self.store._join(t, f"batch_id={batch_id}")) for t in TABLES]
            folders.append(str(self.store.batch_dir(batch_id)))  # final.json, statuses
            if all([self._unchanged(f) for f in folders]) and batch_id in self.examined:
                continue
            for part in entries:
                if batch_id in part.batches:
                    self._remember_entry_rows(part, batch_id)
            rows, schemas, paths = self._rows_from_files(batch_id, self.file_cache)
            held = self.examined.get(batch_id)
            if held is None or held[2] != paths:
                self.examined[batch_id] = (rows, schemas, paths)
                changed = True
            if self.store.read_final(batch_id) is not None and _writable(self.store):
                sealed |= seal_batch(self.store, batch_id, self.file_cache) is not None
        if sealed:
            self._load_parts()
            still = self._open_batches()
            for closed in self.open - still:
                self.examined.pop(closed, None)
                marker = f"/batch_id={closed}/"
                for path in [p for p in self.file_cache if marker in p]:
                    del self.file_cache[path]
            self.open = still
            changed = True
        return changed

    def _remember_entry_rows(self, part: _Part, batch_id: str) -> None:
        rows = part.rows.filter(pc.equal(part.rows["batch_id"], batch_id))
        rows = rows.filter(pc.not_equal(rows["table"], BATCH_ROW))
        if not rows.num_rows:
            return
        keys = rows.select(["table", "chunk", "file_size", "file_mtime_ns"]).group_by(
            ["table", "chunk", "file_size", "file_mtime_ns"], use_threads=False).aggregate([])
        for table, chunk, size, mtime in zip(*(keys[c].to_pylist() for c in keys.column_names)):
            path = str(self.store.table_path(table, batch_id, chunk))
            held = self.file_cache.get(path)
            if held is not None and held[:2] == (size, mtime):
                continue
            mine = rows.filter(pc.and_(pc.equal(rows["table"], table),
                                       pc.equal(rows["chunk"], chunk)))
            self.file_cache[path] = (size, mtime, mine, part.schemas.get(table))

    def _rows_from_files(self, batch_id: str, known: dict):
        parts, paths = [], []
        schemas: dict[str, pa.Schema] = {}
        for table in TABLES:
            folder = str(self.store._join(table, f"batch_id={batch_id}"))
            for info in fs.list_dir(self.store.fs, folder):
                chunk = _chunk_of(info.base_name)
                if info.type != pafs.FileType.File or chunk is None:
                    continue
                held = known.get(info.path)
                if held is None or held[:2] != (info.size, info.mtime_ns):
                    try:
                        rows, schema = _read_key_rows(self.store, table, batch_id, chunk,
                                                      info.path, info.size, info.mtime_ns)
                    except FileNotFoundError:
                        continue
                    except (OSError, pa.ArrowException):
                        continue  # damaged: the table reads quarantine it
                    held = (info.size, info.mtime_ns, rows, schema)
                    self.file_cache[info.path] = held
                parts.append(held[2])
                if held[3] is not None:
                    schemas[table] = _unify([schemas.get(table), held[3]])
                paths.append((info.path, info.size, info.mtime_ns))
        rows = pa.concat_tables(parts) if parts else _empty_rows()
        return rows, schemas, tuple(sorted(paths))

    def _rebuild_views(self) -> None:
        """The rows every read uses: each sealed batch from its newest seal,
        each open batch from its files."""
        tables = []
        schemas: dict[str, list] = {t: [] for t in TABLES}
        trusted: dict[str, set] = {}   # index file -> the batches read from it
        for batch_id, record in self.records.items():
            if batch_id not in self.open:
                trusted.setdefault(record["_from"], set()).add(batch_id)
        for path, part in self.parts.items():
            mine = trusted.get(path)
            if part.kind != "seal" or not mine:
                continue
            if part.keys is None:  # the key rows without the batch records, made once
                part.keys = part.rows.filter(pc.not_equal(part.rows["table"], BATCH_ROW))
            rows = part.keys
            if len(mine) != len(part.records):
                rows = rows.filter(pc.is_in(rows["batch_id"], pa.array(sorted(mine))))
            tables.append(rows)
            for table, schema in part.schemas.items():
                schemas[table].append(schema)
        for batch_id in self.open:
            rows, part_schemas, _ = self.examined.get(batch_id, (None, {}, ()))
            if rows is not None:
                tables.append(rows)
                for table, schema in part_schemas.items():
                    schemas[table].append(schema)
        # (an open batch's rows come from its files: no batch records among them)
        self._combined = pa.concat_tables(tables) if tables else _empty_rows()
        self._schemas = {t: _unify(s) for t, s in schemas.items()}
        self._listings = {}
        self._choices: dict[str, list] | None = None
        self._finished = self._unfinished = self._batch_ids = None
        self.version += 1   # what callers keeping sums over the index compare

    # reads -------------------------------------------------------------------
    @property
    def rows(self) -> pa.Table:
        return self._combined if self._combined is not None else _empty_rows()

    def schema(self, table: str) -> pa.Schema | None:
        """The permissively unified schema of the table's files (as a scan sees it)."""
        return self._schemas.get(table)

    def listing(self, table: str) -> list[tuple[str, int | None, int | None]]:
        """The table's files as (path, size, mtime_ns), sorted: what a
        recursive listing of the table directory finds."""
        with self.lock:
            found = self._listings.get(table)
            if found is None:
                found = self._files(pc.equal(self.rows["table"], table))
                self._listings[table] = found
            return found

    def _files(self, mask) -> list[tuple[str, int | None, int | None]]:
        rows = self.rows.filter(mask).select(["table", "batch_id", "chunk", "file_size",
                                               "file_mtime_ns"])
        if not rows.num_rows:
            return []
        rows = rows.group_by(rows.column_names, use_threads=False).aggregate([])
        out = []
        for table, batch_id, chunk, size, mtime in zip(*(rows[c].to_pylist()
                                                         for c in rows.column_names)):
            out.append((str(self.store.table_path(table, batch_id, chunk)), size, mtime))
        return sorted(out)

    def files_with(self, table: str, column: str, value: str) -> list[str]:
        """Paths of the table's files holding a row with ``column == value``."""
        with self.lock:
            mask = pc.and_(pc.equal(self.rows["table"], table),
                           pc.equal(self.rows[column], value))
            return [p for p, _, _ in self._files(mask)]

    def count(self, table: str, column: str, value: str) -> int:
        with self.lock:
            mask = pc.and_(pc.equal(self.rows["table"], table), pc.equal(self.rows[column], value))
            return int(pc.sum(pc.cast(mask.fill_null(False), pa.int64())).as_py() or 0)

    def choices(self) -> dict[str, list]:
        """Values the overview's filter form offers, from every summaries row."""
        with self.lock:
            if self._choices is None:
                rows = self.rows.filter(pc.equal(self.rows["table"], "summaries"))
                flags = pc.unique(pc.list_flatten(rows["quality_flags"])).drop_null().to_pylist()
                temps = pc.unique(pc.round(rows["temperature_k"], 2)).drop_null().to_pylist()
                self._choices = {
                    "adsorbates": sorted(pc.unique(rows["adsorbate"]).drop_null().to_pylist()),
                    "flags": sorted(flags), "temperatures_k": sorted(temps)}
            return self._choices

    def batch_ids(self) -> list[str]:
        """Accepted batches, newest first (as ``Store.batch_ids``)."""
        with self.lock:
            if self._batch_ids is None or len(self._batch_ids) != len(self.known_batches):
                self._batch_ids = sorted(self.known_batches, reverse=True)
                self._unfinished = None
            return self._batch_ids

    def finished(self) -> dict[str, dict]:
        """Records of the sealed batches that are not open again (do not change it)."""
        with self.lock:
            if self._finished is None:
                self._finished = {b: r for b, r in self.records.items() if b not in self.open}
            return self._finished

    def unfinished_ids(self) -> list[str]:
        """Accepted batches without a trusted seal, newest first."""
        with self.lock:
            if self._unfinished is None:
                finished = self.finished()
                self._unfinished = [b for b in self.batch_ids() if b not in finished]
            return self._unfinished


def _iso_ns(text: str | None) -> int:
    if not text:
        return 0
    moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    return int(moment.timestamp() * 1_000_000) * 1000


_WRITABLE: dict[int, tuple[float, bool]] = {}


def _writable(store) -> bool:
    """Whether this process can write the store (asked at most once a minute)."""
    held = _WRITABLE.get(id(store))
    now = time.monotonic()
    if held is None or now - held[0] > 60:
        held = (now, store.writable())
        _WRITABLE[id(store)] = held
    return held[1]


_ATTACH_LOCK = threading.Lock()


def read_index(store) -> ReadIndex | None:
    """The store's read index, refreshed; None when SORBRANK_READ_INDEX=0.
    Also makes the store's table listings come from the index."""
    if not enabled():
        return None
    with _ATTACH_LOCK:
        index = getattr(store, "_read_index", None)
        if index is None:
            index = ReadIndex(store)
            store._read_index = index
            store.listing_source = _listing_source(index)
    index.refresh()
    return index


def _listing_source(index: ReadIndex):
    def listing(table: str) -> list | None:
        index.refresh()
        return index.listing(table)
    return listing


