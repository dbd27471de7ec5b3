"""Rewrite a store written by an older sorbrank to the current schema version (3).

Version 2 -> 3 (one declared schema per table, worker/store/schema.py):

- every Parquet file is conformed to its table's declared schema: the
  column ``flags`` becomes ``quality_flags``; columns typed null (a text
  column empty for a whole batch) get their declared type; the summaries'
  per-pressure columns ``loading_at_<P>_pa_mol_per_kg`` (and their
  ``_averaged_*`` companions) become the list columns
  ``reference_pressures_pa``, ``reference_loadings_mol_per_kg``, ...; the fits
  get the parameter columns of every catalogue model (typed nulls);
- ``<root>/schema_version.json`` is written last.

Version 1 -> 3 does the above and first what version 2 changed (the sample
became a "sorbent"): column ``material_id`` -> ``sorbent_id``; the
per-sorbent table moves from ``materials/`` to ``sorbents/`` (same batch
partitions and chunk names); manifests: ``chunks[].materials`` ->
``chunks[].sorbents`` and ``mixtures[].material_id`` -> ``mixtures[].sorbent_id``.

A version-3 file whose columns differ from the declared schema (a model
added since brought new parameter columns) is conformed as well.

Crash safety: every file is replaced atomically (``fs.atomic_write``), files
already current are left alone, and a ``materials/`` file is deleted only
once its ``sorbents/`` copy is in place. ``materials/`` goes after the data
files and the marker last, so until the migration has finished the store
still reads as unmigrated (``Store.schema_problem``) and a re-run completes
what a killed run left; a second run on a migrated store changes nothing.
Files of an unknown version stop the migration before anything is written.
Run it with the API and the workers stopped: it does not lock the store.
"""
from __future__ import annotations

import json
import posixpath
import re
from dataclasses import dataclass, field

import pyarrow as pa
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from . import fs
from .store import (SCHEMA_VERSION, SCHEMA_VERSION_KEY, TABLES, VERSION_1_ID_COLUMN,
                    VERSION_1_TABLE, Store, StoreError)
from .store.layout import SCHEMA_MARKER
from .store.schema import QUALITY_FLAGS, REFERENCE_LISTS, SchemaMismatch, conform, declared

KNOWN_VERSIONS = ("1", "2", SCHEMA_VERSION)
# a version-2 summary column at one reference pressure: its label and which figure
# (labels: metrics.common.pressure_label: digits, "p" for the point, "m" for minus, "e")
_PER_PRESSURE = {template: re.compile(
    "^" + re.escape(template).replace(r"\{p\}", "([0-9pme]+)") + "$")
    for _, template in REFERENCE_LISTS}
_RENAMED_MANIFEST_KEYS = {"chunks": ("materials", "sorbents"),
                          "mixtures": (VERSION_1_ID_COLUMN, "sorbent_id")}


@dataclass
class MigrationReport:
    rewritten: dict[str, int] = field(default_factory=dict)  # table -> Parquet files rewritten
    moved: int = 0                  # materials/ files now in sorbents/
    manifests: int = 0              # manifests rewritten
    current: int = 0                # Parquet files already at the current version
    removed_dirs: list[str] = field(default_factory=list)
    marker: bool = False            # schema_version.json written

    @property
    def changed(self) -> bool:
        return bool(sum(self.rewritten.values()) or self.moved or self.manifests
                    or self.removed_dirs or self.marker)

    def lines(self) -> list[str]:
        if not self.changed:
            return [f"nothing to do: the store is at schema version {SCHEMA_VERSION} "
                    f"({self.current} Parquet files checked)"]
        out = [f"{table}: {n} Parquet files rewritten to the declared schema"
               for table, n in sorted(self.rewritten.items()) if n]
        if self.moved:
            out.append(f"{VERSION_1_TABLE}/ -> sorbents/: {self.moved} Parquet files moved")
        if self.manifests:
            out.append(f"{self.manifests} batch manifests updated")
        out += [f"removed {d}" for d in self.removed_dirs]
        if self.marker:
            out.append(f"wrote {SCHEMA_MARKER}")
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


def _pressure(label: str) -> float:
    """The pressure in Pa a version-2 column label names (metrics.common.pressure_label)."""
    return float(label.replace("p", ".").replace("m", "-"))


def _reference_lists(data: pa.Table) -> pa.Table:
    """A version-2 summary with its per-pressure columns gathered into the
    version-3 list columns (pressures in the order the columns were written:
    the order of the batch's conditions)."""
    found: dict[str, dict[str, str]] = {}   # template -> label -> column
    for name in data.column_names:
        for template, pattern in _PER_PRESSURE.items():
            if match := pattern.fullmatch(name):
                found.setdefault(template, {})[match.group(1)] = name
    labels = list(found.get(REFERENCE_LISTS[0][1], {}))
    n = data.num_rows
    pressures = [_pressure(label) for label in labels]
    offsets = pa.array([i * len(labels) for i in range(n + 1)], pa.int32())
    lists = {"reference_pressures_pa": pa.ListArray.from_arrays(
        offsets, pa.array(pressures * n, pa.float64()))}
    for list_name, template in REFERENCE_LISTS:
        names = [found.get(template, {}).get(label) for label in labels]
        if any(name is None for name in names):
            continue
        columns = [data[name].combine_chunks().cast(pa.float64()) for name in names]
        values = [columns[j][i] for i in range(n) for j in range(len(names))]
        lists[list_name] = pa.ListArray.from_arrays(offsets, pa.array(values, pa.float64()))
    gathered = {name for by_label in found.values() for name in by_label.values()}
    data = data.drop_columns(sorted(gathered))
    for name, values in lists.items():
        data = data.append_column(name, values)
    return data


def _as_current(store: Store, path: str, table: str) -> pa.Table:
    data = pq.read_table(path, filesystem=store.fs, partitioning=None)
    renamed = {VERSION_1_ID_COLUMN: "sorbent_id", "flags": QUALITY_FLAGS}
    data = data.rename_columns([renamed.get(n, n) for n in data.column_names])
    if table == "summaries" and "reference_pressures_pa" not in data.column_names:
        data = _reference_lists(data)
    try:
        return conform(table, data)
    except SchemaMismatch as exc:
        raise StoreError(f"{path}: {exc}; files before it were migrated, none after") from None


def _is_current(store: Store, path: str, table: str) -> bool:
    with store.fs.open_input_file(path) as fh:
        schema = pq.read_schema(fh)
    return schema.equals(declared(table), check_metadata=False) and (
        (schema.metadata or {}).get(SCHEMA_VERSION_KEY) == SCHEMA_VERSION.encode())


def _write(store: Store, path: str, data: pa.Table) -> None:
    # page checksums, as Store.write_table writes them
    fs.atomic_write(store.fs, path, lambda fh: pq.write_table(data, fh, write_page_checksum=True))


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

    for table in tables[:-1]:  # inputs, summaries, fits, sorbents: rewritten in place
        for path in files[table]:
            if versions[path] == SCHEMA_VERSION and _is_current(store, path, table):
                report.current += 1
                continue
            _write(store, path, _as_current(store, path, table))
            report.rewritten[table] = report.rewritten.get(table, 0) + 1

    old_base = str(store._join(VERSION_1_TABLE))
    for path in files[VERSION_1_TABLE]:
        # the materials/ file stays the source until its copy is in place: a
        # sorbents/ file left by a killed run is simply written again
        target = str(store._join("sorbents", posixpath.relpath(path, old_base)))
        store.fs.create_dir(posixpath.dirname(target), recursive=True)
        _write(store, target, _as_current(store, path, "sorbents"))
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
    # very last: the marker says every file is current
    if (store._read_json(store._join(SCHEMA_MARKER)) or {}).get("schema_version") != SCHEMA_VERSION:
        store.write_schema_marker()
        report.marker = True
    return report
