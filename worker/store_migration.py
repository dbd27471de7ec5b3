"""Rewrite a store written by an older sorbrank to the current schema version.

Version 1 -> 2 (the sample became a "sorbent"):

- every Parquet file: column ``material_id`` -> ``sorbent_id``, schema-version
  metadata "1" -> "2" (inputs, summaries, fits);
- the per-sorbent table moves from ``materials/`` to ``sorbents/`` (same batch
  partitions and chunk names), rewritten the same way;
- manifests: ``chunks[].materials`` -> ``chunks[].sorbents`` and
  ``mixtures[].material_id`` -> ``mixtures[].sorbent_id``.

Crash safety: every file is replaced atomically (``fs.atomic_write``), files
already at version 2 are left alone, and a ``materials/`` file is deleted only
once its ``sorbents/`` copy is in place. ``materials/`` itself goes last, so
until the migration has finished the store still reads as version 1
(``Store.schema_problem``) and a re-run completes what a killed run left; a
second run on a migrated store changes nothing. Files of an unknown version
stop the migration before anything is written. Run it with the API and the
workers stopped: it does not lock the store.
"""
from __future__ import annotations

import json
import posixpath
from dataclasses import dataclass, field

import pyarrow as pa
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from . import fs
from .store import (SCHEMA_VERSION, SCHEMA_VERSION_KEY, TABLES, VERSION_1_ID_COLUMN,
                    VERSION_1_TABLE, Store, StoreError)

KNOWN_VERSIONS = ("1", SCHEMA_VERSION)
_RENAMED_MANIFEST_KEYS = {"chunks": ("materials", "sorbents"),
                          "mixtures": (VERSION_1_ID_COLUMN, "sorbent_id")}


@dataclass
class MigrationReport:
    rewritten: dict[str, int] = field(default_factory=dict)  # table -> Parquet files rewritten
    moved: int = 0                  # materials/ files now in sorbents/
    manifests: int = 0              # manifests rewritten
    current: int = 0                # Parquet files already at the current version
    removed_dirs: list[str] = field(default_factory=list)

    @property
    def changed(self) -> bool:
        return bool(sum(self.rewritten.values()) or self.moved or self.manifests
                    or self.removed_dirs)

    def lines(self) -> list[str]:
        if not self.changed:
            return [f"nothing to do: the store is at schema version {SCHEMA_VERSION} "
                    f"({self.current} Parquet files checked)"]
        out = [f"{table}: {n} Parquet files rewritten (material_id -> sorbent_id)"
               for table, n in sorted(self.rewritten.items()) if n]
        if self.moved:
            out.append(f"{VERSION_1_TABLE}/ -> sorbents/: {self.moved} Parquet files moved")
        if self.manifests:
            out.append(f"{self.manifests} batch manifests updated")
        out += [f"removed {d}" for d in self.removed_dirs]
        out.append(f"the store is at schema version {SCHEMA_VERSION}")
        return out


def _parquet_files(store: Store, table: str) -> list[str]:
    base = str(store._join(table))
    prefix = base.rstrip("/") + "/"
    return sorted(info.path for info in fs.list_dir(store.fs, base, recursive=True)
                  if info.type == pafs.FileType.File and info.path.endswith(".parquet")
                  # dot-names are a killed writer's temp files, ignored by every reader
                  and not any(part.startswith((".", "_"))
                              for part in info.path[len(prefix):].split("/")))


def _file_version(store: Store, path: str) -> str:
    with store.fs.open_input_file(path) as fh:
        metadata = pq.read_schema(fh).metadata or {}
    return metadata.get(SCHEMA_VERSION_KEY, b"(none)").decode()


def _as_current(store: Store, path: str) -> pa.Table:
    data = pq.read_table(path, filesystem=store.fs, partitioning=None)
    names = ["sorbent_id" if n == VERSION_1_ID_COLUMN else n for n in data.column_names]
    meta = dict(data.schema.metadata or {})
    meta[SCHEMA_VERSION_KEY] = SCHEMA_VERSION.encode()
    return data.rename_columns(names).replace_schema_metadata(meta)


def _write(store: Store, path: str, data: pa.Table) -> None:
    fs.atomic_write(store.fs, path, lambda fh: pq.write_table(data, fh))


def _migrated_manifest(manifest: dict) -> dict | None:
    """The manifest with version-2 keys; None when it has them already."""
    changed = False
    for list_key, (old, new) in _RENAMED_MANIFEST_KEYS.items():
        for entry in manifest.get(list_key) or []:
            if isinstance(entry, dict) and old in entry:
                entry[new] = entry.pop(old)
                changed = True
    return manifest if changed else None


def migrate_store(store: Store) -> MigrationReport:
    """Bring ``store`` to the current schema version (see the module docstring)."""
    report = MigrationReport()
    tables = [t for t in TABLES if t != "sorbents"] + ["sorbents", VERSION_1_TABLE]
    files = {table: _parquet_files(store, table) for table in tables}
    versions = {path: _file_version(store, path) for paths in files.values() for path in paths}
    unknown = sorted(f"{path} (version {v})" for path, v in versions.items()
                     if v not in KNOWN_VERSIONS)
    if unknown:
        raise StoreError(f"{len(unknown)} files of a schema version this sorbrank cannot "
                         "migrate; nothing was changed: " + "; ".join(unknown[:5]))
    if any(v != "1" for p, v in versions.items() if p in set(files[VERSION_1_TABLE])):
        raise StoreError(f"{store.root}: {VERSION_1_TABLE}/ holds files not at version 1; "
                         "nothing was changed")

    for table in tables[:-2]:  # inputs, summaries, fits: rewritten in place
        for path in files[table]:
            if versions[path] == SCHEMA_VERSION:
                report.current += 1
                continue
            _write(store, path, _as_current(store, path))
            report.rewritten[table] = report.rewritten.get(table, 0) + 1
    report.current += len(files["sorbents"])

    old_base = str(store._join(VERSION_1_TABLE))
    for path in files[VERSION_1_TABLE]:
        # the materials/ file stays the source until its copy is in place: a
        # sorbents/ file left by a killed run is simply written again
        target = str(store._join("sorbents", posixpath.relpath(path, old_base)))
        store.fs.create_dir(posixpath.dirname(target), recursive=True)
        _write(store, target, _as_current(store, path))
        store.fs.delete_file(path)
        report.moved += 1

    batches = str(store._join("batches"))
    for info in fs.list_dir(store.fs, batches):
        path = posixpath.join(info.path, "manifest.json")
        data = fs.read_bytes(store.fs, path) if info.type == pafs.FileType.Directory else None
        if data is None:
            continue
        manifest = _migrated_manifest(json.loads(data))
        if manifest is not None:
            store._write_json(path, manifest)
            report.manifests += 1

    # last: while materials/ exists the store reads as unmigrated
    if store.fs.get_file_info(old_base).type == pafs.FileType.Directory:
        leftovers = [i.path for i in fs.list_dir(store.fs, old_base, recursive=True)
                     if i.type == pafs.FileType.File and not i.base_name.startswith(".")]
        if leftovers:
            raise StoreError(f"{old_base} still holds {leftovers[:3]} (not Parquet chunks?); "
                             "move them away and run the migration again")
        store.fs.delete_dir(old_base)
        report.removed_dirs.append(f"{VERSION_1_TABLE}/")
    return report
