"""The store: a Parquet dataset plus small JSON manifests under one root.

Layout (``<table>`` is inputs, summaries, fits or materials)::

    <root>/<table>/batch_id=<id>/chunk-00003.parquet   hive-partitioned by batch
    <root>/batches/<id>/manifest.json                  written once, at acceptance
    <root>/batches/<id>/chunk-00003.json               chunk status (running/done/failed)
    <root>/batches/<id>/final.json                     written when every chunk is settled
    <root>/idempotency/<sha256 of key>.json            Idempotency-Key -> batch id

Every write goes to a temp file whose name starts with "." (pyarrow.dataset and
our own listings skip such names), is fsynced, then renamed over a name that
depends only on (table, batch, chunk). A retried job therefore replaces its
own file instead of adding a copy, and a writer killed half-way leaves only an
ignored dot-file behind.
"""
from __future__ import annotations

import contextlib
import json
import os
import re
import secrets
import tempfile
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Iterable

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from .isotherm import Isotherm

SCHEMA_VERSION = "1"
SCHEMA_VERSION_KEY = b"sorbrank.schema_version"
TABLES = ("inputs", "summaries", "fits", "materials")

# Time-sortable, so a directory listing is already newest-first when reversed,
# and strict, so an id taken from a URL can never name a path outside the store.
BATCH_ID_PATTERN = re.compile(r"^b-\d{8}-\d{6}-\d{6}-[0-9a-f]{8}$")
_KEY_HASH_PATTERN = re.compile(r"^[0-9a-f]{64}$")
_PARTITIONING = ds.partitioning(pa.schema([("batch_id", pa.string())]), flavor="hive")


class StoreError(RuntimeError):
    """The store holds something this code cannot read (e.g. a newer schema)."""


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


def _fsync_dir(path: Path) -> None:
    # the rename itself must survive a power cut, not only the file's bytes
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def atomic_write(path: Path, write: Callable[[Any], None]) -> None:
    """Write via ``write(fileobj)`` to a dot-temp file, fsync, rename to ``path``."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    _fsync_dir(path.parent)


def _json_default(value: Any) -> Any:
    if hasattr(value, "tolist"):  # numpy arrays and scalars
        return value.tolist()
    if isinstance(value, datetime):
        return iso_utc(value)
    raise TypeError(f"cannot store {type(value).__name__} as JSON")


def write_json(path: Path, obj: Any) -> None:
    data = json.dumps(obj, indent=1, sort_keys=True, default=_json_default).encode()
    atomic_write(path, lambda fh: fh.write(data))


def read_json(path: Path) -> Any | None:
    try:
        return json.loads(path.read_text())
    except FileNotFoundError:
        return None


# -- normalised inputs <-> Arrow ------------------------------------------------

INPUT_SCHEMA = pa.schema([
    ("isotherm_id", pa.string()),
    ("material_id", pa.string()),
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


def isotherms_to_table(isotherms: Iterable[Isotherm]) -> pa.Table:
    rows = [{
        "isotherm_id": iso.isotherm_id,
        "material_id": iso.material_id,
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
        "original_json": json.dumps(iso.original, sort_keys=True, default=_json_default),
    } for iso in isotherms]
    return pa.Table.from_pylist(rows, schema=INPUT_SCHEMA)


def table_to_isotherms(table: pa.Table) -> list[Isotherm]:
    import numpy as np

    out = []
    for row in table.to_pylist():
        sigma = row["sigma_mol_per_kg"]
        out.append(Isotherm(
            isotherm_id=row["isotherm_id"],
            material_id=row["material_id"],
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
    def __init__(self, root: str | os.PathLike):
        self.root = Path(root)

    # paths: every one is built from a validated batch id and an int
    def table_path(self, table: str, batch_id: str, chunk_index: int) -> Path:
        if table not in TABLES:
            raise ValueError(f"unknown table {table!r}")
        return (self.root / table / f"batch_id={_check_batch_id(batch_id)}"
                / f"chunk-{int(chunk_index):05d}.parquet")

    def batch_dir(self, batch_id: str) -> Path:
        return self.root / "batches" / _check_batch_id(batch_id)

    def writable(self) -> bool:
        """True when a file can be created, synced and removed under the root."""
        try:
            probe = self.root / ".probe" / f"{os.getpid()}-{secrets.token_hex(4)}"
            atomic_write(probe, lambda fh: fh.write(b"ok"))
            probe.unlink()
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
        atomic_write(path, lambda fh: pq.write_table(data, fh))
        return path

    def read_chunk(self, table: str, batch_id: str, chunk_index: int) -> pa.Table:
        path = self.table_path(table, batch_id, chunk_index)
        data = pq.read_table(path, partitioning=None)
        version = (data.schema.metadata or {}).get(SCHEMA_VERSION_KEY, b"?").decode()
        if version != SCHEMA_VERSION:
            raise StoreError(f"{path}: schema version {version}, this code reads {SCHEMA_VERSION}")
        return data

    def has_chunk(self, table: str, batch_id: str, chunk_index: int) -> bool:
        return self.table_path(table, batch_id, chunk_index).is_file()

    def dataset(self, table: str, batch_id: str | None = None) -> ds.Dataset | None:
        """Chunks of ``table`` across batches (or of one batch), schemas unified.

        None when there are no data files yet.
        """
        base = self.root / table
        scan = base / f"batch_id={_check_batch_id(batch_id)}" if batch_id else base
        if table not in TABLES or not scan.is_dir():
            return None
        factory = ds.FileSystemDatasetFactory(
            pa.fs.LocalFileSystem(), pa.fs.FileSelector(str(scan), recursive=True),
            ds.ParquetFileFormat(),
            ds.FileSystemFactoryOptions(partitioning=_PARTITIONING, partition_base_dir=str(base),
                                        selector_ignore_prefixes=[".", "_"],
                                        # one damaged file must not hide every other batch
                                        exclude_invalid_files=True))
        # chunks written by different runs may differ in which columns are all
        # null; inspecting every fragment lets their types merge
        schema = factory.inspect(promote_options="permissive", fragments=None)
        if len(schema) <= 1:  # only the partition field: no data files yet
            return None
        return factory.finish(schema)

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
        write_json(self.batch_dir(manifest["batch_id"]) / "manifest.json", manifest)

    def read_manifest(self, batch_id: str) -> dict | None:
        return read_json(self.batch_dir(batch_id) / "manifest.json")

    def write_chunk_status(self, batch_id: str, chunk_index: int, status: dict) -> None:
        write_json(self.batch_dir(batch_id) / f"chunk-{int(chunk_index):05d}.json", status)

    def read_chunk_statuses(self, batch_id: str) -> dict[int, dict]:
        out = {}
        for path in sorted(self.batch_dir(batch_id).glob("chunk-[0-9][0-9][0-9][0-9][0-9].json")):
            status = read_json(path)
            if status is not None:
                out[int(path.stem.split("-")[1])] = status
        return out

    def write_final(self, batch_id: str, final: dict) -> None:
        write_json(self.batch_dir(batch_id) / "final.json", final)

    def read_final(self, batch_id: str) -> dict | None:
        return read_json(self.batch_dir(batch_id) / "final.json")

    def batch_ids(self) -> list[str]:
        """Accepted batches (manifest on disk), newest first."""
        base = self.root / "batches"
        if not base.is_dir():
            return []
        ids = [p.name for p in base.iterdir()
               if is_batch_id(p.name) and (p / "manifest.json").is_file()]
        return sorted(ids, reverse=True)

    # idempotency keys (stored by hash: a key is client text, never a path)
    def _key_path(self, key_hash: str) -> Path:
        if not _KEY_HASH_PATTERN.fullmatch(key_hash):
            raise ValueError("idempotency key hash must be 64 hex digits")
        return self.root / "idempotency" / f"{key_hash}.json"

    def read_idempotency(self, key_hash: str) -> dict | None:
        return read_json(self._key_path(key_hash))

    def write_idempotency(self, key_hash: str, record: dict) -> None:
        write_json(self._key_path(key_hash), record)

    def claim_idempotency(self, key_hash: str, record: dict) -> dict:
        """Store ``record`` for the key unless one is there; return the one that holds.

        The complete file is linked into place, and a link never replaces an
        existing name: of two processes racing with one key, exactly one wins.
        """
        path = self._key_path(key_hash)
        path.parent.mkdir(parents=True, exist_ok=True)
        data = json.dumps(record, sort_keys=True).encode()
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
        try:
            with os.fdopen(fd, "wb") as fh:
                fh.write(data)
                fh.flush()
                os.fsync(fh.fileno())
            try:
                os.link(tmp, path)
            except FileExistsError:
                return read_json(path)
            _fsync_dir(path.parent)
            return record
        finally:
            os.unlink(tmp)


# -- rankings across every batch -------------------------------------------------

LATEST_WINS_RULE = (
    "one row per material, adsorbate, branch and temperature (rounded to the nearest "
    "1 K); when several batches measured the same, the batch accepted last wins")


@dataclass
class RankingQuery:
    adsorbate: str | None = None
    temperature_k: float | None = None
    temperature_tolerance_k: float = 0.5
    flags: tuple[str, ...] = ()          # keep rows carrying every one of these
    exclude_flags: tuple[str, ...] = ()  # drop rows carrying any of these
    batch_id: str | None = None
    material_id: str | None = None
    sort: str = "q_sat_mol_per_kg"
    descending: bool = True
    limit: int = 100
    offset: int = 0
    all_results: bool = False


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


def rankings(store: "Store", query: RankingQuery) -> tuple[pa.Table, int]:
    """Filtered, de-duplicated (unless ``all_results``), sorted summaries.

    Returns (the requested page, the number of rows before paging). Filters that
    choose which measurements compete (batch, material, adsorbate, temperature)
    apply before latest-wins; flag filters apply to the winners, so an old
    result never resurfaces because the newer one lacks a flag.
    """
    data = store.dataset("summaries")
    if data is None:
        return pa.table({}), 0
    if query.sort not in sortable_columns(data.schema):
        raise ValueError(f"cannot sort by {query.sort!r}; sortable columns: "
                         + ", ".join(sortable_columns(data.schema)))
    where = None

    def both(expr):
        return expr if where is None else where & expr

    if query.batch_id is not None:
        where = both(ds.field("batch_id") == query.batch_id)
    if query.material_id is not None:
        where = both(ds.field("material_id") == query.material_id)
    if query.adsorbate is not None:
        where = both(ds.field("adsorbate") == query.adsorbate)
    if query.temperature_k is not None:
        tol = abs(query.temperature_tolerance_k)
        where = both((ds.field("temperature_k") >= query.temperature_k - tol)
                     & (ds.field("temperature_k") <= query.temperature_k + tol))
    table = data.to_table(filter=where)

    if not query.all_results and table.num_rows:
        newest_first = table.sort_by([("accepted_at", "descending"), ("batch_id", "descending"),
                                      ("isotherm_id", "ascending")])
        keys = ["material_id", "adsorbate", "_temperature_key"]
        if "branch" in newest_first.column_names:
            keys.append("branch")
        keyed = newest_first.append_column(
            "_temperature_key", pc.round(newest_first["temperature_k"], 0)
        ).append_column("_order", pa.array(range(newest_first.num_rows), pa.int64()))
        first = keyed.group_by(keys, use_threads=False).aggregate([("_order", "min")])
        table = newest_first.take(first["_order_min"])

    if (query.flags or query.exclude_flags) and table.num_rows:
        want, avoid = set(query.flags), set(query.exclude_flags)
        keep = [want <= f and not (avoid & f)
                for f in map(_row_flags, table["flags"].to_pylist())]
        table = table.filter(pa.array(keep, pa.bool_()))

    order = "descending" if query.descending else "ascending"
    table = table.sort_by([(query.sort, order, "at_end"), ("material_id", "ascending", "at_end"),
                           ("isotherm_id", "ascending", "at_end"),
                           ("batch_id", "descending", "at_end")])
    total = table.num_rows
    return table.slice(max(query.offset, 0), max(query.limit, 0)), total


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
    "atomic_write", "is_batch_id", "isotherms_to_table", "iso_utc", "nan_to_none",
    "new_batch_id", "table_to_isotherms", "utc_now", "RankingQuery", "rankings",
    "LATEST_WINS_RULE",
]
