"""The store: a Parquet dataset plus small JSON manifests under one root.

Layout (``<table>`` is inputs, summaries, fits or sorbents)::

    <root>/<table>/batch_id=<id>/chunk-00003.parquet   hive-partitioned by batch
    <root>/batches/<id>/manifest.json                  written once, at acceptance
    <root>/batches/<id>/chunk-00003.json               chunk status (running/done/failed)
    <root>/batches/<id>/final.json                     written when every chunk is settled
    <root>/idempotency/<sha256 of key>.json            Idempotency-Key -> batch id
    <root>/quarantine/<id>/<table>.chunk-00003.<UTC time>.parquet   a damaged file, moved
    <root>/quarantine/<id>/<table>.chunk-00003.<UTC time>.json      why, and when

A data file a reader cannot read whole, that lacks the schema version, or whose
column types clash with the store's is *damaged*: the first reader to meet it
moves it into ``quarantine/`` and logs it (``Store.quarantine``), so every other
read goes on without it. Its chunk then reads as unfinished (results) or failed
(inputs), never as done with fewer rows; see ``Store.quarantine``.

Every write goes to a temp file whose name starts with "." (pyarrow.dataset and
our own listings skip such names), is fsynced, then renamed over a name that
depends only on (table, batch, chunk). A retried job therefore replaces its
own file instead of adding a copy, and a writer killed half-way leaves only an
ignored dot-file behind.

The root is a local path or a URI that pyarrow.fs understands (file://, s3://,
gs://, ...); every file operation goes through that ``pyarrow.fs.FileSystem``
(``worker/fs.py`` says how each kind of filesystem makes a write atomic).
"""
from __future__ import annotations

import json
import logging
import os
import posixpath
import re
import secrets
import threading
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path, PurePosixPath
from typing import Any, Callable, Iterable

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from . import fs
from .isotherm import Isotherm

SCHEMA_VERSION = "2"
SCHEMA_VERSION_KEY = b"sorbrank.schema_version"
TABLES = ("inputs", "summaries", "fits", "sorbents")
# what only a version-1 store holds: its per-sorbent table directory, and the
# sample's id column in every table (``worker/store_migration.py`` rewrites both)
VERSION_1_TABLE = "materials"
VERSION_1_ID_COLUMN = "material_id"

# Time-sortable, so a directory listing is already newest-first when reversed,
# and strict, so an id taken from a URL can never name a path outside the store.
BATCH_ID_PATTERN = re.compile(r"^b-\d{8}-\d{6}-\d{6}-[0-9a-f]{8}$")
_KEY_HASH_PATTERN = re.compile(r"^[0-9a-f]{64}$")
_CHUNK_STATUS_PATTERN = re.compile(r"^chunk-[0-9]{5}\.json$")
_PARTITIONING = ds.partitioning(pa.schema([("batch_id", pa.string())]), flavor="hive")
_INDEX_LOCK = threading.Lock()

log = logging.getLogger(__name__)


def _short(exc: BaseException) -> str:
    """An error's type and first line: what a quarantine record and a status show."""
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0][:300] if text else ''}".rstrip(": ")


class StoreError(RuntimeError):
    """The store holds something this code cannot read (e.g. a newer schema)."""


class DamagedFile(StoreError):
    """A data file of the store is damaged (and now quarantined); running its
    chunk again cannot help when it is the chunk's inputs."""


# columns whose type every reader relies on; a file that stores another type is damaged
CORE_COLUMN_TYPES = {"isotherm_id": pa.string(), "sorbent_id": pa.string(),
                     "adsorbate": pa.string(), "temperature_k": pa.float64(),
                     "branch": pa.string(), "model": pa.string()}
QUARANTINE_DIR = "quarantine"
_CHUNK_FILE_PATTERN = re.compile(r"^chunk-([0-9]{5})\.parquet$")


def version_1_error(where: str, root: Any) -> StoreError:
    return StoreError(
        f"{where}: written by an older sorbrank (store schema version 1, 'material_id' and "
        f"'materials'); this sorbrank reads version {SCHEMA_VERSION}. Stop the API and the "
        f"workers and run 'sorbrank migrate-store --data-dir {root}' once")


def utc_now() -> datetime:
    return datetime.now(timezone.utc)


def iso_utc(moment: datetime) -> str:
    # fixed width, so that timestamps also sort correctly as text
    return moment.astimezone(timezone.utc).isoformat(timespec="microseconds").replace("+00:00", "Z")


def new_batch_id(now: datetime | None = None) -> str:
    now = now or utc_now()
    return f"b-{now:%Y%m%d-%H%M%S-%f}-{secrets.token_hex(4)}"


def is_batch_id(text: str) -> bool:
    return bool(BATCH_ID_PATTERN.fullmatch(text or ""))


def _check_batch_id(batch_id: str) -> str:
    if not is_batch_id(batch_id):
        raise ValueError(f"not a batch id: {batch_id!r}")
    return batch_id


def atomic_write(path: Path, write: Callable[[Any], None]) -> None:
    """Local files: write via ``write(fileobj)`` to a dot-temp file, fsync, rename."""
    fs.local_atomic_write(path, write)


def _json_default(value: Any) -> Any:
    if hasattr(value, "tolist"):  # numpy arrays and scalars
        return value.tolist()
    if isinstance(value, datetime):
        return iso_utc(value)
    raise TypeError(f"cannot store {type(value).__name__} as JSON")


def original_json(original: dict) -> str:
    """An isotherm's as-sent values as JSON text (keys sorted; NaN as null).

    orjson writes numpy arrays from their buffers; the standard library's
    json turned each number into a Python float first, about 40 % of the
    time of accepting a batch (benchmarks/bench_ingest.py)."""
    return orjson.dumps(original, default=_json_default,
                        option=orjson.OPT_SORT_KEYS | orjson.OPT_SERIALIZE_NUMPY).decode()


def _json_bytes(obj: Any) -> bytes:
    return json.dumps(obj, indent=1, sort_keys=True, default=_json_default).encode()


def write_json(path: Path, obj: Any) -> None:
    data = _json_bytes(obj)
    atomic_write(path, lambda fh: fh.write(data))


def read_json(path: Path) -> Any | None:
    try:
        return json.loads(path.read_text())
    except FileNotFoundError:
        return None


# -- normalised inputs <-> Arrow ------------------------------------------------

INPUT_SCHEMA = pa.schema([
    ("isotherm_id", pa.string()),
    ("sorbent_id", pa.string()),
    ("adsorbate", pa.string()),
    ("temperature_k", pa.float64()),
    ("branch", pa.string()),
    ("saturation_pressure_pa", pa.float64()),
    ("surface_area_m2_per_g", pa.float64()),
    ("batch_label", pa.string()),
    ("flags", pa.list_(pa.string())),
    ("pressure_pa", pa.list_(pa.float64())),
    ("loading_mol_per_kg", pa.list_(pa.float64())),
    ("sigma_mol_per_kg", pa.list_(pa.float64())),
    ("original_json", pa.string()),
])


def _float_lists(arrays: list) -> pa.Array:
    """list<double> column from per-row arrays (None = null), built in one go."""
    lengths = np.array([0 if a is None else len(a) for a in arrays], dtype=np.int64)
    offsets = np.concatenate([[0], np.cumsum(lengths)])
    present = [np.asarray(a, dtype=np.float64).ravel() for a in arrays if a is not None]
    values = np.concatenate(present) if present else np.empty(0, dtype=np.float64)
    missing = np.array([a is None for a in arrays], dtype=bool)
    list_type = pa.list_(pa.float64())
    return pa.ListArray.from_arrays(pa.array(offsets, pa.int32()), pa.array(values, pa.float64()),
                                    type=list_type,
                                    mask=pa.array(missing) if missing.any() else None)


def isotherms_to_table(isotherms: Iterable[Isotherm]) -> pa.Table:
    # column by column: the point arrays go to Arrow as whole numpy buffers,
    # never value by value (the same table as building it row by row)
    isotherms = list(isotherms)
    columns = {
        "isotherm_id": pa.array([iso.isotherm_id for iso in isotherms], pa.string()),
        "sorbent_id": pa.array([iso.sorbent_id for iso in isotherms], pa.string()),
        "adsorbate": pa.array([iso.adsorbate for iso in isotherms], pa.string()),
        "temperature_k": pa.array([float(iso.temperature_k) for iso in isotherms], pa.float64()),
        "branch": pa.array([iso.branch for iso in isotherms], pa.string()),
        "saturation_pressure_pa": pa.array([iso.saturation_pressure_pa for iso in isotherms],
                                           pa.float64()),
        "surface_area_m2_per_g": pa.array([iso.surface_area_m2_per_g for iso in isotherms],
                                          pa.float64()),
        "batch_label": pa.array([iso.batch_label for iso in isotherms], pa.string()),
        "flags": pa.array([list(iso.flags) for iso in isotherms], pa.list_(pa.string())),
        "pressure_pa": _float_lists([iso.pressure_pa for iso in isotherms]),
        "loading_mol_per_kg": _float_lists([iso.loading_mol_per_kg for iso in isotherms]),
        "sigma_mol_per_kg": _float_lists([iso.sigma_mol_per_kg for iso in isotherms]),
        "original_json": pa.array([original_json(iso.original) for iso in isotherms], pa.string()),
    }
    return pa.Table.from_arrays(list(columns.values()), schema=INPUT_SCHEMA)


def _isotherms_to_table_by_rows(isotherms: Iterable[Isotherm]) -> pa.Table:
    """Row by row, the plain way; tests check ``isotherms_to_table`` equals it."""
    rows = [{
        "isotherm_id": iso.isotherm_id,
        "sorbent_id": iso.sorbent_id,
        "adsorbate": iso.adsorbate,
        "temperature_k": float(iso.temperature_k),
        "branch": iso.branch,
        "saturation_pressure_pa": iso.saturation_pressure_pa,
        "surface_area_m2_per_g": iso.surface_area_m2_per_g,
        "batch_label": iso.batch_label,
        "flags": list(iso.flags),
        "pressure_pa": [float(v) for v in iso.pressure_pa],
        "loading_mol_per_kg": [float(v) for v in iso.loading_mol_per_kg],
        "sigma_mol_per_kg": None if iso.sigma_mol_per_kg is None
        else [float(v) for v in iso.sigma_mol_per_kg],
        "original_json": original_json(iso.original),
    } for iso in isotherms]
    return pa.Table.from_pylist(rows, schema=INPUT_SCHEMA)


def table_to_isotherms(table: pa.Table) -> list[Isotherm]:
    import numpy as np

    out = []
    for row in table.to_pylist():
        sigma = row["sigma_mol_per_kg"]
        out.append(Isotherm(
            isotherm_id=row["isotherm_id"],
            sorbent_id=row["sorbent_id"],
            adsorbate=row["adsorbate"],
            temperature_k=row["temperature_k"],
            pressure_pa=np.asarray(row["pressure_pa"], dtype=float),
            loading_mol_per_kg=np.asarray(row["loading_mol_per_kg"], dtype=float),
            branch=row["branch"],
            saturation_pressure_pa=row["saturation_pressure_pa"],
            sigma_mol_per_kg=None if sigma is None else np.asarray(sigma, dtype=float),
            surface_area_m2_per_g=row["surface_area_m2_per_g"],
            batch_label=row["batch_label"],
            flags=list(row["flags"] or []),
            original=json.loads(row["original_json"]),
        ))
    return out


# -- the store ------------------------------------------------------------------

class Store:
    """The store under ``root``: a local path, a URI pyarrow.fs understands, or
    a path inside an explicitly given ``filesystem``."""

    def __init__(self, root: str | os.PathLike, filesystem: pafs.FileSystem | None = None):
        self.fs, self.base = fs.open_root(root, filesystem)
        local = fs.is_local(self.fs)
        # local stores hand out real Paths; elsewhere paths are pure names
        self._path_type = Path if local else PurePosixPath
        # what recreates this store in another process (str(root))
        self.root = Path(self.base) if local else os.fspath(root)
        # rankings: fragments and schema of the summaries, kept between queries
        self._summaries_index = _TableIndex("summaries")
        self._indexes: dict[str, _TableIndex] = {}  # the other tables, made on first use
        self._accepted: set[str] = set()  # batch ids whose manifest was seen
        # batch id -> (adsorption, desorption pressure) from its manifest, written once
        self._batch_pressures: dict[str, tuple[float, float] | None] = {}

    def _join(self, *parts: str):
        return self._path_type(posixpath.join(self.base, *parts))

    # paths: every one is built from a validated batch id and an int
    def table_path(self, table: str, batch_id: str, chunk_index: int) -> Path:
        if table not in TABLES:
            raise ValueError(f"unknown table {table!r}")
        return self._join(table, f"batch_id={_check_batch_id(batch_id)}",
                          f"chunk-{int(chunk_index):05d}.parquet")

    def batch_dir(self, batch_id: str) -> Path:
        return self._join("batches", _check_batch_id(batch_id))

    def _write_json(self, path, obj: Any) -> None:
        data = _json_bytes(obj)
        fs.atomic_write(self.fs, str(path), lambda fh: fh.write(data))

    def _read_json(self, path) -> Any | None:
        data = fs.read_bytes(self.fs, str(path))
        return None if data is None else json.loads(data)

    def check_writable(self) -> None:
        """Create, sync and remove a probe file under the root; OSError when that fails."""
        probe = str(self._join(".probe", f"{os.getpid()}-{secrets.token_hex(4)}"))
        fs.atomic_write(self.fs, probe, lambda fh: fh.write(b"ok"))
        self.fs.delete_file(probe)

    def writable(self) -> bool:
        """True when a file can be created, synced and removed under the root."""
        try:
            self.check_writable()
            return True
        except OSError:
            return False

    # tables
    def write_table(self, table: str, batch_id: str, chunk_index: int, data: pa.Table) -> Path:
        if "batch_id" in data.column_names:  # the partition directory carries it
            data = data.drop_columns(["batch_id"])
        meta = dict(data.schema.metadata or {})
        meta[SCHEMA_VERSION_KEY] = SCHEMA_VERSION.encode()
        data = data.replace_schema_metadata(meta)
        path = self.table_path(table, batch_id, chunk_index)
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
        status = self.read_chunk_statuses(batch_id).get(chunk_index)
        if status is None or status.get("state") not in ("done", "failed"):
            return  # not settled yet: its run writes the file again
        if record["table"] == "inputs":
            status = {**status, "state": "failed", "done": 0,
                      "error": f"DamagedFile: the inputs file is damaged ({record['reason']}) "
                               f"and was moved to {record['file']}; the chunk cannot be refitted"}
        else:
            status = {"state": "queued", "attempts": 0, "refit_after_damage": record["file"]}
        self.write_chunk_status(batch_id, chunk_index, status)
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

    def has_chunk(self, table: str, batch_id: str, chunk_index: int) -> bool:
        path = str(self.table_path(table, batch_id, chunk_index))
        return self.fs.get_file_info(path).type == pafs.FileType.File

    def schema_problem(self) -> str | None:
        """Why this store must be migrated before it is used (None = it need not).

        Cheap (one lookup): a version-1 store keeps its ``materials`` table until
        its migration has rewritten every other file."""
        if self.fs.get_file_info(str(self._join(VERSION_1_TABLE))).type != pafs.FileType.NotFound:
            return str(version_1_error(f"{self.root}: the store", self.root))
        return None

    def _refuse_version_1(self, schema: pa.Schema | None = None) -> None:
        """StoreError when ``schema`` has the version-1 id column (without a
        schema: when the store still has its version-1 table)."""
        if schema is None:
            if problem := self.schema_problem():
                raise StoreError(problem)
        elif VERSION_1_ID_COLUMN in schema.names:
            raise version_1_error(f"{self.root}: a table with a {VERSION_1_ID_COLUMN!r} column",
                                  self.root)

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
        snap = self._index(table).current(self)
        if batch_id is None:
            return snap.dataset
        fragments = [f for f, b in zip(snap.fragments, snap.batch_of_file) if b == batch_id]
        return _dataset_of(self, fragments)

    def _index(self, table: str) -> "_TableIndex":
        if table == "summaries":
            return self._summaries_index
        with _INDEX_LOCK:
            return self._indexes.setdefault(table, _TableIndex(table))

    def is_accepted(self, batch_id: str) -> bool:
        """True once the batch's manifest is on disk (kept: it is never removed)."""
        if batch_id in self._accepted:
            return True
        info = self.fs.get_file_info(str(self._join("batches", batch_id, "manifest.json")))
        if info.type == pafs.FileType.File:
            self._accepted.add(batch_id)
            return True
        return False

    def query(self, table: str, where: ds.Expression | None = None) -> pa.Table:
        data = self.dataset(table)
        if data is None:
            return pa.table({})
        return data.to_table(filter=where)

    def batch_table(self, table: str, batch_id: str) -> pa.Table:
        data = self.dataset(table, batch_id)
        return pa.table({}) if data is None else data.to_table()

    # manifests and chunk status
    def write_manifest(self, manifest: dict) -> None:
        self._write_json(self.batch_dir(manifest["batch_id"]) / "manifest.json", manifest)

    def read_manifest(self, batch_id: str) -> dict | None:
        return self._read_json(self.batch_dir(batch_id) / "manifest.json")

    def write_chunk_status(self, batch_id: str, chunk_index: int, status: dict) -> None:
        self._write_json(self.batch_dir(batch_id) / f"chunk-{int(chunk_index):05d}.json", status)

    def remove_chunk_status(self, batch_id: str, chunk_index: int) -> None:
        """Forget a chunk's status (it reads as queued again); freeing space always works."""
        path = str(self.batch_dir(batch_id) / f"chunk-{int(chunk_index):05d}.json")
        try:
            self.fs.delete_file(path)
        except FileNotFoundError:
            pass

    def remove_unaccepted(self, batch_id: str) -> bool:
        """Delete what an acceptance that failed before its manifest wrote (its input
        files); False, and nothing deleted, when the batch has a manifest after all."""
        if self.read_manifest(batch_id) is not None:
            return False
        part = f"batch_id={_check_batch_id(batch_id)}"
        for folder in [self._join(table, part) for table in TABLES] + [self.batch_dir(batch_id)]:
            if self.fs.get_file_info(str(folder)).type == pafs.FileType.Directory:
                self.fs.delete_dir(str(folder))
        return True

    def batch_pressures(self, batch_id: str | None) -> tuple[float, float] | None:
        """(adsorption, desorption pressure) in Pa a batch's loadings and
        working capacity were computed at (its manifest's conditions); None
        when unknown. Kept: a manifest never changes once written."""
        if batch_id is None or not is_batch_id(batch_id):
            return None
        if batch_id not in self._batch_pressures:
            manifest = self.read_manifest(batch_id) or {}
            conditions = manifest.get("conditions") or {}
            try:
                found = (float(conditions["adsorption_pressure_pa"]),
                         float(conditions["desorption_pressure_pa"]))
            except (KeyError, TypeError, ValueError):
                found = None
            if manifest:  # an absent manifest may yet be written: ask again next time
                self._batch_pressures[batch_id] = found
            return found
        return self._batch_pressures[batch_id]

    def read_chunk_statuses(self, batch_id: str) -> dict[int, dict]:
        out = {}
        names = sorted(info.base_name for info in fs.list_dir(self.fs, str(self.batch_dir(batch_id)))
                       if _CHUNK_STATUS_PATTERN.fullmatch(info.base_name))
        for name in names:
            status = self._read_json(self.batch_dir(batch_id) / name)
            if status is not None:
                out[int(name[len("chunk-"):-len(".json")])] = status
        return out

    def write_final(self, batch_id: str, final: dict) -> None:
        self._write_json(self.batch_dir(batch_id) / "final.json", final)

    def read_final(self, batch_id: str) -> dict | None:
        return self._read_json(self.batch_dir(batch_id) / "final.json")

    def batch_ids(self) -> list[str]:
        """Accepted batches (manifest on disk), newest first."""
        candidates = [info.base_name for info in fs.list_dir(self.fs, str(self._join("batches")))
                      if info.type == pafs.FileType.Directory and is_batch_id(info.base_name)]
        manifests = self.fs.get_file_info(
            [str(self._join("batches", b, "manifest.json")) for b in candidates])
        ids = [b for b, info in zip(candidates, manifests) if info.type == pafs.FileType.File]
        return sorted(ids, reverse=True)

    def batch_size_bytes(self, batch_id: str) -> int:
        """Bytes of every file of one batch: its table chunks, manifest and statuses."""
        part = f"batch_id={_check_batch_id(batch_id)}"
        dirs = [self._join(table, part) for table in TABLES] + [self.batch_dir(batch_id)]
        return sum(info.size or 0 for d in dirs for info in fs.list_dir(self.fs, str(d), recursive=True)
                   if info.type == pafs.FileType.File)

    # idempotency keys (stored by hash: a key is client text, never a path)
    def _key_path(self, key_hash: str) -> Path:
        if not _KEY_HASH_PATTERN.fullmatch(key_hash):
            raise ValueError("idempotency key hash must be 64 hex digits")
        return self._join("idempotency", f"{key_hash}.json")

    def read_idempotency(self, key_hash: str) -> dict | None:
        return self._read_json(self._key_path(key_hash))

    def write_idempotency(self, key_hash: str, record: dict) -> None:
        self._write_json(self._key_path(key_hash), record)

    def claim_idempotency(self, key_hash: str, record: dict) -> dict:
        """Store ``record`` for the key unless one is there; return the one that holds.

        On a local filesystem the complete file is linked into place, and a link
        never replaces an existing name: of two processes racing with one key,
        exactly one wins (elsewhere see ``fs.create_if_absent``).
        """
        path = str(self._key_path(key_hash))
        if fs.create_if_absent(self.fs, path, json.dumps(record, sort_keys=True).encode()):
            return record
        return self._read_json(path)


# -- rankings across every batch -------------------------------------------------

LATEST_WINS_RULE = (
    "one row per sorbent, adsorbate, branch and temperature (rounded to the nearest "
    "1 K); when several batches measured the same, the batch accepted last wins")


@dataclass
class RankingQuery:
    adsorbate: str | None = None
    temperature_k: float | None = None
    temperature_tolerance_k: float = 0.5
    flags: tuple[str, ...] = ()          # keep rows carrying every one of these
    exclude_flags: tuple[str, ...] = ()  # drop rows carrying any of these
    batch_id: str | None = None
    sorbent_id: str | None = None
    sort: str = "loading_ads_mol_per_kg"   # DEFAULT_RANKING_SORT
    descending: bool = True
    limit: int = 100
    offset: int = 0
    all_results: bool = False
    # rows whose sorted figure is not supported by the data come after the rest
    unreliable_last: bool = True


# The default ranking leads with a figure inside the measured range: the
# loading at the batch's adsorption pressure, at the isotherm's own
# temperature (docs/results.md, "Default ranking").
DEFAULT_RANKING_SORT = "loading_ads_mol_per_kg"
# a saturation capacity whose standard error exceeds this share of it is not
# ranked on (common practice for "poorly determined", no published source)
Q_SAT_MAX_RELATIVE_STDERR = 0.25
# sort column -> the boolean column that says whether a row's value is supported
RELIABILITY_OF_SORT = {
    "loading_ads_mol_per_kg": "loading_ads_reliable",
    "working_capacity_mol_per_kg": "working_capacity_reliable",
    "q_sat_mol_per_kg": "q_sat_reliable",
    "q_sat_stderr_mol_per_kg": "q_sat_reliable",
    "q_sat_ci95_low_mol_per_kg": "q_sat_reliable",
    "q_sat_ci95_high_mol_per_kg": "q_sat_reliable",
}
# reliability column -> (value columns it is judged on, flags that make it an extrapolation)
_RELIABILITY_RULES = {
    "q_sat_reliable": (("q_sat_mol_per_kg", "q_sat_stderr_mol_per_kg"),
                       ("capacity_extrapolated",)),
    "loading_ads_reliable": (("loading_ads_mol_per_kg",), ("extrapolated_adsorption_pressure",)),
    "working_capacity_reliable": (("working_capacity_mol_per_kg",),
                                  ("extrapolated_adsorption_pressure",
                                   "extrapolated_desorption_pressure")),
}
# the process conditions behind the per-isotherm loadings and working capacity
# (a pressure swing at the isotherm's own temperature)
CONDITION_COLUMNS = ("adsorption_pressure_pa", "desorption_pressure_pa",
                     "adsorption_temperature_k", "desorption_temperature_k")
# sort column -> the condition columns its value depends on
CONDITIONS_OF_SORT = {
    "loading_ads_mol_per_kg": ("adsorption_pressure_pa", "adsorption_temperature_k"),
    "loading_des_mol_per_kg": ("desorption_pressure_pa", "desorption_temperature_k"),
    "working_capacity_mol_per_kg": CONDITION_COLUMNS,
}
_REFERENCE_LOADING = re.compile(r"^loading_at_.+_pa_mol_per_kg$")


def conditions_of_sort(sort: str) -> tuple[str, ...]:
    """The condition columns a ranking by ``sort`` depends on (none for other figures)."""
    if _REFERENCE_LOADING.fullmatch(sort):  # the pressure is in the column's name
        return ("adsorption_temperature_k",)
    return CONDITIONS_OF_SORT.get(sort, ())


def rows_with_flag(flags, name: str) -> np.ndarray:
    """(n,) bool: which rows of a flags column (list of strings, or "a;b" text) hold ``name``."""
    flags = flags.combine_chunks() if isinstance(flags, pa.ChunkedArray) else flags
    if (pa.types.is_list(flags.type) or pa.types.is_large_list(flags.type)) and (
            pa.types.is_string(flags.type.value_type)
            or pa.types.is_large_string(flags.type.value_type)):
        # vectorised: nulls and null items hold none
        values = pc.list_flatten(flags)
        parents = pc.list_parent_indices(flags).to_numpy(zero_copy_only=False)
        hit = pc.equal(values, name).fill_null(False).to_numpy(zero_copy_only=False)
        has = np.zeros(len(flags), dtype=bool)
        has[parents[hit]] = True
        return has
    return np.array([name in _row_flags(f) for f in flags.to_pylist()], dtype=bool)


def _float_values(table: pa.Table, name: str) -> np.ndarray:
    """A column as float64 (null -> NaN); all NaN when the table lacks it."""
    if name not in table.column_names:
        return np.full(table.num_rows, np.nan)
    column = table[name]
    if not (pa.types.is_floating(column.type) or pa.types.is_integer(column.type)
            or pa.types.is_null(column.type)):
        return np.full(table.num_rows, np.nan)
    return np.asarray(pc.cast(column, pa.float64()).to_numpy(zero_copy_only=False),
                      dtype=np.float64)


def reliable_rows(table: pa.Table, reliability: str) -> np.ndarray:
    """(n,) bool: the rows whose figure the ``reliability`` rule accepts.

    A figure is reliable when it is a finite number, no flag marks it as an
    extrapolation, and, for the saturation capacity, it is positive with a
    standard error at most Q_SAT_MAX_RELATIVE_STDERR of it. Judged from the
    stored values and flags, so rows written before the rule existed get it too."""
    values, extrapolation_flags = _RELIABILITY_RULES[reliability]
    with np.errstate(invalid="ignore", divide="ignore"):
        figure = _float_values(table, values[0])
        ok = np.isfinite(figure)
        if reliability == "q_sat_reliable":
            stderr = _float_values(table, values[1])
            ok &= (figure > 0) & np.isfinite(stderr) & (stderr <= Q_SAT_MAX_RELATIVE_STDERR * figure)
    if "flags" in table.column_names:
        for name in extrapolation_flags:
            ok &= ~rows_with_flag(table["flags"], name)
    return ok


def _row_flags(value) -> set[str]:
    if value is None:
        return set()
    if isinstance(value, str):  # tolerate flags stored as "a;b"
        return {f for f in value.replace(",", ";").split(";") if f}
    return set(value)


def sortable_columns(schema: pa.Schema) -> list[str]:
    return [f.name for f in schema
            if not (pa.types.is_nested(f.type) or pa.types.is_binary(f.type))
            and not f.name.startswith("_")]


@dataclass
class _Snapshot:
    """The table's files as one listing found them."""

    key: tuple
    dataset: ds.Dataset | None
    fragments: list
    batch_of_file: list            # partition value (batch id) of each fragment
    own_batch_column: bool         # some file stores a batch_id column itself
    combined: dict                 # column name -> array over every file, file order
    lengths: np.ndarray | None = None


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
        self.files: dict[str, tuple] = {}    # path -> (size, mtime_ns, fragment | None)
        self.snapshot: _Snapshot | None = None
        # kept columns per file (slices of the snapshot's combined arrays),
        # read with ``column_schema``
        self.columns: dict[str, dict[str, pa.Array]] = {}
        self.column_schema: pa.Schema | None = None

    def dataset(self, store: "Store") -> ds.Dataset | None:
        return self.current(store).dataset

    def current(self, store: "Store") -> _Snapshot:
        base = str(store._join(self.table))
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
        key = tuple(listing)
        with self.lock:
            if self.snapshot is not None and self.snapshot.key == key and None not in (
                    m for _, _, m in listing):
                return self.snapshot
            fmt = ds.ParquetFileFormat()
            files = {}
            for path, size, mtime_ns in listing:
                known = self.files.get(path)
                if known is not None and known[:2] == (size, mtime_ns) and mtime_ns is not None:
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
                files[path] = (size, mtime_ns, fragment,
                               None if fragment is None else ds.get_partition_keys(
                                   fragment.partition_expression).get("batch_id"),
                               names is not None and "batch_id" in names)
            _drop_clashing_types(store, files, [p for p, _, _ in listing])
            for path in set(self.files) - set(files) | {
                    p for p in files if self.files.get(p) is not files[p]}:
                for cached in self.columns.values():  # gone or replaced: read again
                    cached.pop(path, None)
            self.files = files
            kept = [files[path] for path, _, _ in listing if path in files]
            fragments = [k[2] for k in kept]
            dataset = _dataset_of(store, fragments)
            self.snapshot = _Snapshot(key, dataset, fragments, [k[3] for k in kept],
                                      any(k[4] for k in kept), {})
            return self.snapshot

    def key_columns(self, snap: _Snapshot, names: list[str]) -> dict[str, pa.Array]:
        """``names`` over every file of the snapshot, in its file and row order."""
        dataset, fragments = snap.dataset, snap.fragments
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
            schema = pa.unify_schemas([schema, files[path][2].physical_schema],
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


# columns latest-wins and the final order need, besides the sort column
_RANKING_KEYS = ("batch_id", "isotherm_id", "sorbent_id", "adsorbate", "temperature_k",
                 "accepted_at")


def rankings(store: "Store", query: RankingQuery) -> tuple[pa.Table, int]:
    """Filtered, de-duplicated (unless ``all_results``), sorted summaries:
    (the requested page of stored rows, the number of rows before paging).
    ``ranking`` adds the columns and conditions a reader needs."""
    page, total, _ = _rank(store, query)
    return page, total


def _rank(store: "Store", query: RankingQuery) -> tuple[pa.Table, int, pa.Table]:
    """Filtered, de-duplicated (unless ``all_results``), sorted summaries.

    Returns (the requested page, the number of rows before paging, the batch
    id and temperature of every ranked row). Filters that
    choose which measurements compete (batch, sorbent, adsorbate, temperature)
    apply before latest-wins; flag filters apply to the winners, so an old
    result never resurfaces because the newer one lacks a flag.

    The ranking runs on the few columns it needs (identity, temperature,
    acceptance time, the sort column, flags when filtered on), kept in memory
    per summary file between queries (files never change once written; new
    ones are read when they appear); the page's whole rows are then read from
    the row groups that hold them. Where that does not apply, the whole-row
    path (``_rank_whole_rows`` over a dataset scan) gives the same result.
    """
    index = getattr(store, "_summaries_index", None)
    snap = index.current(store) if index is not None else None
    data = snap.dataset if snap is not None else store.dataset("summaries")
    if data is None:
        return pa.table({}), 0, pa.table({})
    if query.sort not in sortable_columns(data.schema):
        raise ValueError(f"cannot sort by {query.sort!r}; sortable columns: "
                         + ", ".join(sortable_columns(data.schema)))
    where = None

    def both(expr):
        return expr if where is None else where & expr

    if query.batch_id is not None:
        where = both(ds.field("batch_id") == query.batch_id)
    if query.sorbent_id is not None:
        where = both(ds.field("sorbent_id") == query.sorbent_id)
    if query.adsorbate is not None:
        where = both(ds.field("adsorbate") == query.adsorbate)
    if query.temperature_k is not None:
        tol = abs(query.temperature_tolerance_k)
        where = both((ds.field("temperature_k") >= query.temperature_k - tol)
                     & (ds.field("temperature_k") <= query.temperature_k + tol))
    if index is not None and all(name in data.schema.names for name in _RANKING_KEYS):
        ranked = _rank_cached(index, snap, query)
        if ranked is not None:
            return ranked
    return _ranked_whole_rows(data.to_table(filter=where), query)


def _latest_rows(table: pa.Table) -> np.ndarray | None:
    """Latest wins: row indices of one row per sorbent, adsorbate,
    temperature (nearest 1 K) and branch -- the one accepted last, then of
    the larger batch id, then of the smaller isotherm id; nulls lose.

    Found on integer codes; None where
    this path does not apply (NaN temperatures, a key space too large for one
    int64), and ``_latest_wins_by_sorting`` decides instead.

    Sorting a million rows by timestamp, batch id and isotherm id (strings)
    took most of an unfiltered ranking; here the strings are ranked once per
    distinct value, the rows are ordered on integers, and isotherm ids are
    compared only between rows that tie on everything else."""
    keys = ["sorbent_id", "adsorbate", "temperature_k"]
    if "branch" in table.column_names:
        keys.append("branch")
    group = np.zeros(table.num_rows, dtype=np.int64)
    span = 1
    for name in keys:
        column = table[name].combine_chunks()
        if name == "temperature_k":
            column = pc.round(column, 0)
            if pc.any(pc.is_nan(column)).as_py():
                return None
        codes, size = _codes(column)
        span *= size + 1
        if span >= 2 ** 62:
            return None
        group = group * (size + 1) + codes
    accepted = table["accepted_at"].combine_chunks()
    # newest first, nulls last: order on the negated values, a null as the largest
    if pa.types.is_timestamp(accepted.type) or pa.types.is_integer(accepted.type):
        values = pc.cast(accepted, pa.int64()).fill_null(np.iinfo(np.int64).min + 1)
        newest = -values.to_numpy(zero_copy_only=False)
    else:
        codes, size = _codes(accepted, ranked=True)
        newest = np.where(codes < size, -codes, 1)
    batch_codes, n_batches = _codes(table["batch_id"].combine_chunks(), ranked=True)
    later_batch = np.where(batch_codes < n_batches, -batch_codes, 1)   # larger id first, null last
    order = np.lexsort((later_batch, newest, group))
    g, a, b = group[order], newest[order], later_batch[order]
    first = np.ones(order.size, dtype=bool)
    first[1:] = g[1:] != g[:-1]
    same = np.zeros(order.size, dtype=bool)
    same[1:] = ~first[1:] & (a[1:] == a[:-1]) & (b[1:] == b[:-1])
    run = np.cumsum(~same)                     # runs of rows equal on all but the isotherm id
    top = run == run[np.flatnonzero(first)][np.cumsum(first) - 1]
    tied_group = np.zeros(order.size, dtype=bool)
    tied_group[top & ~first] = True
    if not tied_group.any():
        return order[first]
    # groups whose newest batch holds several of its rows: the smaller isotherm id
    # wins (nulls last, then the earlier row: lexsort and sort_by are stable)
    group_no = np.cumsum(first) - 1
    has_tie = np.zeros(int(group_no[-1]) + 1, dtype=bool)
    has_tie[group_no[tied_group]] = True
    in_tie = top & has_tie[group_no]
    rows = order[in_tie]
    small = pa.table({"g": pa.array(group_no[in_tie]),
                      "iso": table["isotherm_id"].take(pa.array(rows)),
                      "row": pa.array(rows)})
    small = small.sort_by([("g", "ascending"), ("iso", "ascending")])
    sg = small["g"].to_numpy()
    lead = np.ones(sg.size, dtype=bool)
    lead[1:] = sg[1:] != sg[:-1]
    return np.concatenate([order[first & ~has_tie[group_no]], small["row"].to_numpy()[lead]])


def _codes(column: pa.Array, ranked: bool = False) -> tuple[np.ndarray, int]:
    """Integer code per row (a null gets the largest, ``size``) and the number
    of distinct non-null values; ``ranked``: codes follow the values' order."""
    encoded = pc.dictionary_encode(column)
    size = len(encoded.dictionary)
    codes = encoded.indices.fill_null(size).to_numpy(zero_copy_only=False).astype(np.int64)
    if ranked and size:
        rank = np.empty(size, dtype=np.int64)
        rank[pc.sort_indices(encoded.dictionary).to_numpy()] = np.arange(size)
        codes = np.where(codes < size, rank[np.minimum(codes, size - 1)], size)
    return codes, size


def _latest_wins_by_sorting(table: pa.Table) -> pa.Table:
    newest_first = table.sort_by([("accepted_at", "descending"), ("batch_id", "descending"),
                                  ("isotherm_id", "ascending")])
    keys = ["sorbent_id", "adsorbate", "_temperature_key"]
    if "branch" in newest_first.column_names:
        keys.append("branch")
    keyed = newest_first.append_column(
        "_temperature_key", pc.round(newest_first["temperature_k"], 0)
    ).append_column("_order", pa.array(range(newest_first.num_rows), pa.int64()))
    first = keyed.group_by(keys, use_threads=False).aggregate([("_order", "min")])
    return newest_first.take(first["_order_min"])


def _flag_filter(table: pa.Table, query: RankingQuery) -> pa.Table:
    keep = np.ones(table.num_rows, dtype=bool)
    for name in query.flags:
        keep &= rows_with_flag(table["flags"], name)
    for name in query.exclude_flags:
        keep &= ~rows_with_flag(table["flags"], name)
    return table.filter(pa.array(keep, pa.bool_()))


# helper column: 1 where the row's sorted figure is unreliable (they rank after the rest)
_DEMOTED = "_demoted"


def _sorted_for_page(table: pa.Table, query: RankingQuery) -> pa.Table:
    order = "descending" if query.descending else "ascending"
    first = [(_DEMOTED, "ascending")] if _DEMOTED in table.column_names else []
    return table.sort_by(first + [(query.sort, order, "at_end"),
                                  ("sorbent_id", "ascending", "at_end"),
                                  ("isotherm_id", "ascending", "at_end"),
                                  ("batch_id", "descending", "at_end")])


def _rank_whole_rows(table: pa.Table, query: RankingQuery) -> tuple[pa.Table, int]:
    """Latest-wins, flag filter, order and page over complete rows."""
    page, total, _ = _ranked_whole_rows(table, query)
    return page, total


def _ranked_whole_rows(table: pa.Table, query: RankingQuery
                       ) -> tuple[pa.Table, int, pa.Table]:
    """The page, the number of ranked rows, and the batch id and temperature
    of every ranked row (what the conditions of the ranking are read from)."""
    rows = None   # the winners by index, taken only once it is known which are needed
    if not query.all_results and table.num_rows:
        rows = _latest_rows(table)
        if rows is None:
            table = _latest_wins_by_sorting(table)
    if (query.flags or query.exclude_flags) and table.num_rows:
        if rows is not None:
            table, rows = table.take(pa.array(rows)), None
        table = _flag_filter(table, query)
    reliability = RELIABILITY_OF_SORT.get(query.sort) if query.unreliable_last else None
    if reliability is not None and table.num_rows:
        if rows is not None:
            table, rows = table.take(pa.array(rows)), None
        table = table.append_column(_DEMOTED, pa.array(
            (~reliable_rows(table, reliability)).astype(np.int8)))
    ranked_keys = [n for n in ("batch_id", "temperature_k") if n in table.column_names]
    ranked = table.select(ranked_keys) if rows is None else \
        table.select(ranked_keys).take(pa.array(rows))
    page, total = _page_of(table, rows, query)
    if _DEMOTED in page.column_names:
        page = page.drop_columns([_DEMOTED])
    return page, total, ranked


def _page_of(table: pa.Table, rows: np.ndarray | None, query: RankingQuery) -> tuple[pa.Table, int]:
    """The requested page of ``table`` (of its ``rows`` only, when given) in
    ranking order, and how many rows were ranked.

    Only the rows that can reach the page are sorted whole: with a float sort
    column they are the ones at or beyond the page's last value (ties kept,
    so the tie-breaking order is untouched); NaN and null sort last and are
    needed only when fewer finite values than the page's end exist."""
    total = table.num_rows if rows is None else len(rows)
    end = max(query.offset, 0) + max(query.limit, 0)
    column = table[query.sort]
    if 0 < end < total and pa.types.is_floating(column.type):
        values = (column if rows is None else column.take(pa.array(rows))).to_numpy(zero_copy_only=False)
        values = np.asarray(values, dtype=np.float64)
        finite = ~np.isnan(values)
        if _DEMOTED in table.column_names:  # demoted rows come after every other value
            demoted = table[_DEMOTED] if rows is None else table[_DEMOTED].take(pa.array(rows))
            finite &= demoted.to_numpy(zero_copy_only=False) == 0
        if int(finite.sum()) > end:
            ahead = values if query.descending else -values
            last = np.partition(ahead[finite], -end)[-end]
            keep = np.flatnonzero(finite & (ahead >= last))
            rows = keep if rows is None else rows[keep]
    if rows is not None:
        table = table.take(pa.array(rows))
    table = _sorted_for_page(table, query)
    return table.slice(max(query.offset, 0), max(query.limit, 0)), total


def _rank_cached(index: _TableIndex, snap: _Snapshot, query: RankingQuery
                 ) -> tuple[pa.Table, int, pa.Table] | None:
    """Rank on the kept key columns, then read the page's whole rows by
    (file, row); None when the store needs the whole-row path."""
    data, fragments = snap.dataset, snap.fragments
    if snap.own_batch_column:
        return None  # a file carrying its own batch_id: let the dataset reconcile it
    names = [n for n in _RANKING_KEYS if n != "batch_id"]
    names += [c for c in ("branch",) if c in data.schema.names]
    if (query.flags or query.exclude_flags) and "flags" in data.schema.names:
        names.append("flags")
    if query.sort not in names and query.sort != "batch_id":
        names.append(query.sort)
    reliability = RELIABILITY_OF_SORT.get(query.sort) if query.unreliable_last else None
    if reliability is not None:  # what the sorted figure's reliability is judged on
        values, _ = _RELIABILITY_RULES[reliability]
        names += [n for n in (*values, "flags") if n in data.schema.names and n not in names]
    columns = index.key_columns(snap, names)
    lengths = snap.lengths
    file_of_row = np.repeat(np.arange(len(fragments), dtype=np.int64), lengths)

    # the filters that choose the competitors, as one mask (null counts as false)
    mask = None

    def both(condition):
        condition = np.asarray(condition.fill_null(False).to_numpy(zero_copy_only=False)
                               if not isinstance(condition, np.ndarray) else condition, bool)
        return condition if mask is None else mask & condition

    if query.batch_id is not None:  # a partition value: decided per file
        mask = both(np.array([b == query.batch_id for b in snap.batch_of_file], bool)[file_of_row])
    if query.sorbent_id is not None:
        mask = both(pc.equal(columns["sorbent_id"], query.sorbent_id))
    if query.adsorbate is not None:
        mask = both(pc.equal(columns["adsorbate"], query.adsorbate))
    if query.temperature_k is not None:
        tol = abs(query.temperature_tolerance_k)
        temperature = columns["temperature_k"]
        mask = both(pc.and_(pc.greater_equal(temperature, query.temperature_k - tol),
                            pc.less_equal(temperature, query.temperature_k + tol)))
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64)
    if mask is None:
        chosen = np.arange(len(file_of_row))
        table = pa.table(columns)
    else:
        chosen = np.flatnonzero(mask)
        picks = pa.array(chosen)
        table = pa.table({name: columns[name].take(picks) for name in names})
    files = file_of_row[chosen]
    table = table.append_column("_file", pa.array(files)).append_column(
        "_row", pa.array(chosen - starts[files])).append_column(
        "batch_id", pa.array(snap.batch_of_file, pa.string()).take(pa.array(files)))
    page, total, ranked = _ranked_whole_rows(table, query)
    if page.num_rows == 0:
        return data.schema.empty_table(), total, ranked

    # the page's rows, read whole from the row groups that hold them
    file_no = page["_file"].to_numpy()
    row_no = page["_row"].to_numpy()
    subsets, expected = [], []
    for f in np.unique(file_no):
        fragment = fragments[f]
        sizes = np.array([rg.num_rows for rg in fragment.row_groups], dtype=np.int64)
        bounds = np.concatenate([[0], np.cumsum(sizes)])
        groups = np.unique(np.searchsorted(bounds, row_no[file_no == f], side="right") - 1)
        subsets.append(fragment.subset(row_group_ids=[int(g) for g in groups]))
        expected.extend(f * (1 << 32) + np.arange(bounds[g], bounds[g + 1]) for g in groups)
    rows = ds.FileSystemDataset(subsets, data.schema, data.format, data.filesystem).to_table()
    expected = np.concatenate(expected)
    wanted = file_no * (1 << 32) + row_no
    if rows.num_rows != len(expected):
        return None  # the files changed under the query: rank again over whole rows
    at = np.searchsorted(expected, wanted)
    if np.any(at >= len(expected)) or np.any(expected[np.minimum(at, len(expected) - 1)] != wanted):
        return None
    return rows.take(pa.array(at)).replace_schema_metadata(data.schema.metadata), total, ranked


@dataclass
class Ranking:
    """A ranking as readers get it: the page with its reliability and
    condition columns, and the conditions the ranked rows were computed at."""

    page: pa.Table
    total: int
    sort: str
    unreliable_last: bool
    reliability_column: str | None    # the column that demotes rows for this sort
    # distinct conditions of the sorted figure over every ranked row (not only
    # the page), most rows first: the condition columns and "rows"
    condition_sets: list[dict]

    @property
    def mixed_conditions(self) -> bool:
        return len(self.condition_sets) > 1


def ranking(store: "Store", query: RankingQuery) -> Ranking:
    """``rankings`` plus, on every row, the conditions behind its loadings and
    working capacity and the reliability columns; and which condition sets
    the ranked rows span for the sorted figure."""
    page, total, ranked = _rank(store, query)
    pressures = [store.batch_pressures(b) for b in _column_list(page, "batch_id")]
    page = with_ranking_columns(page, pressures)
    sets = condition_sets(ranked, store.batch_pressures, conditions_of_sort(query.sort),
                          abs(query.temperature_tolerance_k))
    return Ranking(page, total, query.sort, query.unreliable_last,
                   RELIABILITY_OF_SORT.get(query.sort), sets)


def _column_list(table: pa.Table, name: str) -> list:
    return table[name].to_pylist() if name in table.column_names else [None] * table.num_rows


def with_ranking_columns(table: pa.Table, pressures: list[tuple[float, float] | None]
                         ) -> pa.Table:
    """``table`` with the condition columns (adsorption and desorption
    pressure of each row's batch, ``pressures``: (p_ads, p_des) in Pa or None
    per row; both temperatures are the isotherm's own, a pressure swing) and
    the reliability columns. Columns the rows already carry are kept."""
    def add(t: pa.Table, name: str, values: pa.Array) -> pa.Table:
        return t if name in t.column_names else t.append_column(name, values)

    temperature = table["temperature_k"] if "temperature_k" in table.column_names else \
        pa.nulls(table.num_rows, pa.float64())
    columns = {
        "adsorption_pressure_pa": pa.array([None if p is None else p[0] for p in pressures],
                                           pa.float64()),
        "desorption_pressure_pa": pa.array([None if p is None else p[1] for p in pressures],
                                           pa.float64()),
        "adsorption_temperature_k": temperature,
        "desorption_temperature_k": temperature,
    }
    for name, values in columns.items():
        table = add(table, name, values)
    for reliability in _RELIABILITY_RULES:
        # judged again on every read: the rule applies to rows stored before it existed
        if reliability in table.column_names:
            table = table.drop_columns([reliability])
        table = table.append_column(reliability, pa.array(reliable_rows(table, reliability)))
    return table


def condition_sets(ranked: pa.Table, pressures_of_batch: Callable[[str | None], tuple | None],
                   names: tuple[str, ...], temperature_tolerance_k: float) -> list[dict]:
    """The distinct values of the condition columns ``names`` over the ranked
    rows (batch_id, temperature_k), with how many rows each holds, most first.

    Temperatures that lie within ``temperature_tolerance_k`` of the lowest of
    a run count as one (the ranking's own "same temperature"); a set shows
    their mean. Pressures are the batch's, compared exactly."""
    if not names or ranked.num_rows == 0:
        return []
    batches = _column_list(ranked, "batch_id")
    pressures = {b: pressures_of_batch(b) for b in set(batches)}
    temperature = np.asarray(_float_values(ranked, "temperature_k"))
    cluster = np.full(len(temperature), -1, dtype=np.int64)   # -1: unknown temperature
    known = np.flatnonzero(np.isfinite(temperature))
    means: list[float] = []
    if known.size:
        order = known[np.argsort(temperature[known], kind="stable")]
        start = None
        for i in order:
            if start is None or temperature[i] - start > temperature_tolerance_k:
                start = temperature[i]
                means.append([])
            means[-1].append(temperature[i])
            cluster[i] = len(means) - 1
        means = [round(float(np.mean(m)), 2) for m in means]
    counts: dict[tuple, int] = {}
    for batch, c in zip(batches, cluster):
        p = pressures.get(batch)
        values = {"adsorption_pressure_pa": None if p is None else p[0],
                  "desorption_pressure_pa": None if p is None else p[1],
                  "adsorption_temperature_k": None if c < 0 else means[c],
                  "desorption_temperature_k": None if c < 0 else means[c]}
        key = tuple(values[n] for n in names)
        counts[key] = counts.get(key, 0) + 1
    ordered = sorted(counts.items(), key=lambda kv: (-kv[1], [(v is None, v or 0) for v in kv[0]]))
    return [{**dict(zip(names, key)), "rows": n} for key, n in ordered]


def nan_to_none(rows: list[dict]) -> list[dict]:
    """JSON has no NaN/inf: report them as null."""
    def clean(value):
        if isinstance(value, float) and (value != value or value in (float("inf"), float("-inf"))):
            return None
        if isinstance(value, list):
            return [clean(v) for v in value]
        if isinstance(value, dict):
            return {k: clean(v) for k, v in value.items()}
        if isinstance(value, datetime):
            return iso_utc(value)
        return value
    return [clean(row) for row in rows]


__all__ = [
    "BATCH_ID_PATTERN", "SCHEMA_VERSION", "SCHEMA_VERSION_KEY", "Store", "StoreError",
    "VERSION_1_ID_COLUMN", "VERSION_1_TABLE", "version_1_error",
    "atomic_write", "is_batch_id", "isotherms_to_table", "iso_utc", "nan_to_none",
    "new_batch_id", "table_to_isotherms", "utc_now", "RankingQuery", "rankings",
    "LATEST_WINS_RULE", "DEFAULT_RANKING_SORT", "Q_SAT_MAX_RELATIVE_STDERR", "Ranking", "ranking",
    "CONDITION_COLUMNS", "RELIABILITY_OF_SORT", "conditions_of_sort", "condition_sets",
    "reliable_rows", "rows_with_flag", "with_ranking_columns",
]
