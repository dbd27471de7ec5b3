"""The store's layout on disk: paths, the schema version, batch ids, JSON
records written atomically (manifests, chunk statuses, final records,
idempotency keys). The data tables build on it (``tables.Store``).
"""
from __future__ import annotations

import json
import os
import posixpath
import re
import secrets
from datetime import datetime, timezone
from pathlib import Path, PurePath, PurePosixPath
from typing import Any, Callable

import orjson
import pyarrow as pa
import pyarrow.fs as pafs

from .. import fs
# re-exported: the package and tables.py take the version from here
from .schema import SCHEMA_VERSION, SCHEMA_VERSION_KEY  # noqa: F401

TABLES = ("inputs", "summaries", "fits", "sorbents")
# <root>/schema_version.json: the version every data file of the store is at;
# written with a new store's first file and by ``sorbrank migrate-store`` when
# it has finished. A store with data files and without it predates version 3.
SCHEMA_MARKER = "schema_version.json"
# what only a version-1 store holds: its per-sorbent table directory, and the
# sample's id column in every table (``worker/store_migration.py`` rewrites both)
VERSION_1_TABLE = "materials"
VERSION_1_ID_COLUMN = "material_id"

# Time-sortable, so a directory listing is already newest-first when reversed,
# and strict, so an id taken from a URL can never name a path outside the store.
BATCH_ID_PATTERN = re.compile(r"^b-\d{8}-\d{6}-\d{6}-[0-9a-f]{8}$")
_KEY_HASH_PATTERN = re.compile(r"^[0-9a-f]{64}$")
_CHUNK_STATUS_PATTERN = re.compile(r"^chunk-[0-9]{5}\.json$")


def _short(exc: BaseException) -> str:
    """An error's type and first line: what a quarantine record and a status show."""
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0][:300] if text else ''}".rstrip(": ")


class StoreError(RuntimeError):
    """The store holds something this code cannot read (e.g. a newer schema)."""


class DamagedFile(StoreError):
    """A data file of the store is damaged (and now quarantined); running its
    chunk again cannot help when it is the chunk's inputs."""


def version_1_error(where: str, root: Any) -> StoreError:
    return StoreError(
        f"{where}: written by an older sorbrank (store schema version 1, 'material_id' and "
        f"'materials'); this sorbrank reads version {SCHEMA_VERSION}. Stop the API and the "
        f"workers and run 'sorbrank migrate-store --data-dir {root}' once")


def older_version_error(where: str, root: Any, version: str = "2") -> StoreError:
    return StoreError(
        f"{where}: written by an older sorbrank (store schema version {version}); this "
        f"sorbrank reads version {SCHEMA_VERSION} (docs/schema.md). Stop the API and the "
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


def original_json(original: dict[str, Any]) -> str:
    """An isotherm's as-sent values as JSON text (keys sorted; NaN as null).

    orjson writes numpy arrays from their buffers; the standard library's
    json turned each number into a Python float first, about 40 % of the
    time of accepting a batch (benchmarks/bench_ingest.py)."""
    return orjson.dumps(original, default=_json_default,
                        option=orjson.OPT_SORT_KEYS | orjson.OPT_SERIALIZE_NUMPY).decode()


def _json_bytes(obj: Any) -> bytes:
    return json.dumps(obj, indent=1, sort_keys=True, default=_json_default).encode()




def nan_to_none(rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """JSON has no NaN/inf: report them as null."""
    def clean(value: Any) -> Any:
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



class StoreLayout:
    """Where everything of the store under ``root`` lives, and its JSON records:
    a local path, a URI pyarrow.fs understands, or a path inside an explicitly
    given ``filesystem``."""

    def __init__(self, root: str | os.PathLike[str],
                 filesystem: pafs.FileSystem | None = None) -> None:
        self.fs, self.base = fs.open_root(root, filesystem)
        local = fs.is_local(self.fs)
        # local stores hand out real Paths; elsewhere paths are pure names
        self._path_type: type[PurePath] = Path if local else PurePosixPath
        # what recreates this store in another process (str(root))
        self.root = Path(self.base) if local else os.fspath(root)
        self._accepted: set[str] = set()  # batch ids whose manifest was seen
        # batch id -> (adsorption, desorption pressure) from its manifest, written once
        self._batch_pressures: dict[str, tuple[float, float] | None] = {}

    def _join(self, *parts: str) -> PurePath:
        return self._path_type(posixpath.join(self.base, *parts))

    # paths: every one is built from a validated batch id and an int
    def table_path(self, table: str, batch_id: str, chunk_index: int) -> PurePath:
        if table not in TABLES:
            raise ValueError(f"unknown table {table!r}")
        return self._join(table, f"batch_id={_check_batch_id(batch_id)}",
                          f"chunk-{int(chunk_index):05d}.parquet")

    def batch_dir(self, batch_id: str) -> PurePath:
        return self._join("batches", _check_batch_id(batch_id))

    def _write_json(self, path: PurePath | str, obj: Any) -> None:
        data = _json_bytes(obj)
        fs.atomic_write(self.fs, str(path), lambda fh: fh.write(data))

    def _read_json(self, path: PurePath | str) -> Any | None:
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

    def has_chunk(self, table: str, batch_id: str, chunk_index: int) -> bool:
        path = str(self.table_path(table, batch_id, chunk_index))
        return self.fs.get_file_info(path).type == pafs.FileType.File

    def schema_problem(self) -> str | None:
        """Why this store must be migrated before it is used (None = it need not).

        Cheap (one lookup): a version-1 store keeps its ``materials`` table until
        its migration has rewritten every other file."""
        if self.fs.get_file_info(str(self._join(VERSION_1_TABLE))).type != pafs.FileType.NotFound:
            return str(version_1_error(f"{self.root}: the store", self.root))
        marker = self._read_json(self._join(SCHEMA_MARKER))
        if marker is None and self._has_data_files():
            # a writer writes the marker before its first data file: data seen now
            # means a concurrent first write made the marker after our first look
            # (without this second look, a new store under concurrent intakes
            # looked like an old one: a 500 on POST /batches under load)
            marker = self._read_json(self._join(SCHEMA_MARKER))
            if marker is None:
                return str(older_version_error(f"{self.root}: the store (no {SCHEMA_MARKER})",
                                               self.root))
        if marker is not None:
            version = str(marker.get("schema_version"))
            if version == SCHEMA_VERSION:
                return None
            if version in ("1", "2"):
                return str(older_version_error(f"{self.root}: the store", self.root, version))
            return (f"{self.root}: the store is at schema version {version}; this sorbrank "
                    f"reads version {SCHEMA_VERSION} (a newer sorbrank wrote it?)")
        return None

    def _has_data_files(self) -> bool:
        """True when any table has a batch directory (one listing per table)."""
        return any(info.type == pafs.FileType.Directory and info.base_name.startswith("batch_id=")
                   for table in TABLES for info in fs.list_dir(self.fs, str(self._join(table))))

    def ensure_current_schema(self) -> None:
        """Before the first write: StoreError when the store is at an older
        schema version (a worker must not add version-3 files to it); a new
        store gets its marker. Checked once per instance."""
        if getattr(self, "_schema_checked", False):
            return
        if problem := self.schema_problem():
            raise StoreError(problem)
        if self._read_json(self._join(SCHEMA_MARKER)) is None:
            self.write_schema_marker()
        self._schema_checked = True

    def write_schema_marker(self) -> None:
        self._write_json(self._join(SCHEMA_MARKER), {"schema_version": SCHEMA_VERSION})

    def _refuse_version_1(self, schema: pa.Schema | None = None) -> None:
        """StoreError when ``schema`` has the version-1 id column (without a
        schema: when the store still has its version-1 table)."""
        if schema is None:
            # one lookup per read; the version-2 check (schema_problem) runs where
            # the service and the workers start and before a store's first write
            if self.fs.get_file_info(str(self._join(VERSION_1_TABLE))).type != \
                    pafs.FileType.NotFound:
                raise version_1_error(f"{self.root}: the store", self.root)
        elif VERSION_1_ID_COLUMN in schema.names:
            raise version_1_error(f"{self.root}: a table with a {VERSION_1_ID_COLUMN!r} column",
                                  self.root)

    def is_accepted(self, batch_id: str) -> bool:
        """True once the batch's manifest is on disk (kept: it is never removed)."""
        if batch_id in self._accepted:
            return True
        info = self.fs.get_file_info(str(self._join("batches", batch_id, "manifest.json")))
        if info.type == pafs.FileType.File:
            self._accepted.add(batch_id)
            return True
        return False

    # manifests and chunk status
    def write_manifest(self, manifest: dict[str, Any]) -> None:
        self._write_json(self.batch_dir(manifest["batch_id"]) / "manifest.json", manifest)

    def read_manifest(self, batch_id: str) -> dict[str, Any] | None:
        return self._read_json(self.batch_dir(batch_id) / "manifest.json")

    def write_chunk_status(self, batch_id: str, chunk_index: int, status: dict[str, Any]) -> None:
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

    def read_chunk_statuses(self, batch_id: str) -> dict[int, dict[str, Any]]:
        out = {}
        names = sorted(info.base_name for info in fs.list_dir(self.fs, str(self.batch_dir(batch_id)))
                       if _CHUNK_STATUS_PATTERN.fullmatch(info.base_name))
        for name in names:
            status = self._read_json(self.batch_dir(batch_id) / name)
            if status is not None:
                out[int(name[len("chunk-"):-len(".json")])] = status
        return out

    def write_final(self, batch_id: str, final: dict[str, Any]) -> None:
        self._write_json(self.batch_dir(batch_id) / "final.json", final)

    def read_final(self, batch_id: str) -> dict[str, Any] | None:
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
    def _key_path(self, key_hash: str) -> PurePath:
        if not _KEY_HASH_PATTERN.fullmatch(key_hash):
            raise ValueError("idempotency key hash must be 64 hex digits")
        return self._join("idempotency", f"{key_hash}.json")

    def read_idempotency(self, key_hash: str) -> dict[str, Any] | None:
        return self._read_json(self._key_path(key_hash))

    def write_idempotency(self, key_hash: str, record: dict[str, Any]) -> None:
        self._write_json(self._key_path(key_hash), record)

    def claim_idempotency(self, key_hash: str, record: dict[str, Any]) -> dict[str, Any] | None:
        """Store ``record`` for the key unless one is there; return the one that holds.

        On a local filesystem the complete file is linked into place, and a link
        never replaces an existing name: of two processes racing with one key,
        exactly one wins (elsewhere see ``fs.create_if_absent``). None only when
        the record that won was deleted before it could be read (the store never
        deletes one).
        """
        path = str(self._key_path(key_hash))
        if fs.create_if_absent(self.fs, path, json.dumps(record, sort_keys=True).encode()):
            return record
        return self._read_json(path)

