"""Reads of stored results for people and clients: one isotherm with its
fits, a sorbent's isotherms, tables and isosteric heat. Flask-free: the API
(``service/api``) and the HTML pages (``service/web``) both read through here.

Each read asks the store's read index (``index.py``) which files hold the
rows it needs and opens only those; with SORBRANK_READ_INDEX=0, or when an
indexed file cannot be read, it scans the tables as before (``_scan``).

Nothing is refitted here. The points are the normalised inputs the store kept
at acceptance; the curves come from the stored fits and summary of the same
batch, so a picture always shows what the rankings were built from.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds

from ..models import CATALOGUE
from . import index as read_index
from .index_reader import ReadIndex
from .layout import nan_to_none
from .rankings import RankingQuery, _rank_whole_rows, rankings
from .tables import Store

FIT_FIELDS = ("model", "converged", "reason", "selected", "excluded_reason", "n_params",
              "rmse", "r2", "aicc", "akaike_weight")
# what GET /sorbents/<id> returns, key -> table
SORBENT_TABLES = (("isotherms", "inputs"), ("summaries", "summaries"),
                  ("fits", "fits"), ("sorbent_metrics", "sorbents"))


@dataclass
class StoredIsotherm:
    """One isotherm of one batch as the store holds it."""

    batch_id: str
    inputs: dict                      # a row of the inputs table
    summary: dict | None = None       # its summaries row, once fitted
    fits: list[dict] = field(default_factory=list)  # one dict per model, see fit_entry

    @property
    def pressure_pa(self) -> list[float]:
        return self.inputs["pressure_pa"] or []

    @property
    def loading_mol_per_kg(self) -> list[float]:
        return self.inputs["loading_mol_per_kg"] or []

    @property
    def saturation_pressure_pa(self) -> float | None:
        p0_pa = self.inputs.get("saturation_pressure_pa")
        return p0_pa if p0_pa is not None and math.isfinite(p0_pa) and p0_pa > 0 else None

    def record(self) -> dict:
        """The record shape sorbrank.service.plots draws from (as ``sorbrank fit`` emits)."""
        summary = self.summary or {}
        return {
            "isotherm_id": self.inputs["isotherm_id"],
            "sorbent_id": self.inputs["sorbent_id"],
            "adsorbate": self.inputs["adsorbate"],
            "temperature_k": self.inputs["temperature_k"],
            "saturation_pressure_pa": self.saturation_pressure_pa,
            "best_model": summary.get("best_model"),
            "ambiguous": bool(summary.get("ambiguous")),
            "fits": self.fits,
            "linearized_langmuir": {"q_sat": summary.get("linearized_q_sat_mol_per_kg"),
                                    "affinity": summary.get("linearized_affinity_per_pa")},
            "summary": summary,
        }


def fit_entry(row: dict) -> dict:
    """A fits-table row as a record fit: parameters gathered under ``params``."""
    model_id = row.get("model")
    model = CATALOGUE.get(model_id) if isinstance(model_id, str) else None
    names = model.param_names() if model is not None else []
    entry = {name: row.get(name) for name in FIT_FIELDS}
    entry["params"] = {name: row.get(f"param_{name}") for name in names}
    entry["stderr"] = {name: row.get(f"stderr_{name}") for name in names}
    return entry


_PARTITION = pa.schema([("batch_id", pa.string())])
# page checksums verified, as the table reads do: a damaged page raises here
# (and the scan then quarantines the file) instead of reading as other values
_FORMAT = ds.ParquetFileFormat(default_fragment_scan_options=ds.ParquetFragmentScanOptions(
    page_checksum_verification=True))


class _IndexMiss(Exception):
    """An indexed file could not be read (moved, damaged): scan instead."""


def _index(store: Store) -> ReadIndex | None:
    return read_index.read_index(store)


def _indexed(store: Store, index: ReadIndex, table: str, column: str, value: str,
             where: ds.Expression) -> pa.Table:
    """``store.query(table, where)`` over the files the index says hold a row
    with ``column == value`` (``where`` must imply it); same columns, same order."""
    schema = index.schema(table)
    if schema is None:
        return pa.table({})
    schema = pa.unify_schemas([schema, _PARTITION], promote_options="permissive")
    paths = index.files_with(table, column, value)
    if not paths:
        return schema.empty_table()
    fragments = []
    for path in paths:  # sorted, as a listing of the table would be
        batch_id = path.rsplit("/batch_id=", 1)[1].split("/", 1)[0]
        fragments.append(_FORMAT.make_fragment(
            path, store.fs, partition_expression=ds.field("batch_id") == batch_id))
    try:
        # a few files: threads cost more than they save
        return ds.FileSystemDataset(fragments, schema, _FORMAT, store.fs).to_table(
            filter=where, use_threads=len(fragments) > 16)
    except (OSError, pa.ArrowException) as exc:
        raise _IndexMiss(str(exc)) from exc


def _query(store: Store, table: str, column: str, value: str, where: ds.Expression) -> pa.Table:
    index = _index(store)
    if index is not None:
        try:
            return _indexed(store, index, table, column, value, where)
        except _IndexMiss:
            pass  # the scan below quarantines a damaged file and reads the rest
    return _scan(store, table, where)


def _scan(store: Store, table: str, where: ds.Expression) -> pa.Table:
    return store.query(table, where)


def _rows(store: Store, table: str, where: ds.Expression, column: str, value: str) -> list[dict]:
    return nan_to_none(_query(store, table, column, value, where).to_pylist())


def load_isotherm(store: Store, isotherm_id: str, batch_id: str | None = None
                  ) -> StoredIsotherm | None:
    """The isotherm in ``batch_id``, or in the newest batch holding it; None if absent."""
    where = ds.field("isotherm_id") == isotherm_id
    if batch_id is not None:
        where = where & (ds.field("batch_id") == batch_id)
    inputs = _rows(store, "inputs", where, "isotherm_id", isotherm_id)
    if not inputs:
        return None
    newest = max(inputs, key=lambda r: r["batch_id"])  # batch ids sort by acceptance time
    where = (ds.field("isotherm_id") == isotherm_id) & (ds.field("batch_id") == newest["batch_id"])
    summaries = _rows(store, "summaries", where, "isotherm_id", isotherm_id)
    fits = [fit_entry(r) for r in _rows(store, "fits", where, "isotherm_id", isotherm_id)]
    return StoredIsotherm(newest["batch_id"], newest, summaries[0] if summaries else None, fits)


def qst_rows(store: Store, sorbent_id: str, adsorbate: str | None = None) -> list[dict]:
    """Newest isosteric-heat row per adsorbate of a sorbent, sorted by adsorbate."""
    data = _query(store, "sorbents", "sorbent_id", sorbent_id,
                  ds.field("sorbent_id") == sorbent_id)
    if "kind" not in data.column_names or not data.num_rows:
        return []
    data = data.filter(pc.equal(data["kind"], "isosteric_heat"))
    newest: dict[str, dict] = {}
    for row in nan_to_none(data.to_pylist()):
        if adsorbate is not None and row.get("adsorbate") != adsorbate:
            continue
        held = newest.get(row["adsorbate"])
        if held is None or row["batch_id"] > held["batch_id"]:
            newest[row["adsorbate"]] = row
    return [newest[k] for k in sorted(newest)]


def sorbent_isotherms(store: Store, sorbent_id: str,
                      results: list[dict]) -> list[StoredIsotherm]:
    """The stored inputs, summary and fits behind each current result row
    (``results``: summary rows of the sorbent), fits best supported first."""
    where = ds.field("sorbent_id") == sorbent_id
    wanted = {(r["batch_id"], r["isotherm_id"]) for r in results}

    def by_key(table: str) -> dict:
        grouped: dict = {}
        for row in nan_to_none(_query(store, table, "sorbent_id", sorbent_id, where).to_pylist()):
            key = (row.get("batch_id"), row.get("isotherm_id"))
            if key in wanted:
                grouped.setdefault(key, []).append(row)
        return grouped

    inputs, fits = by_key("inputs"), by_key("fits")
    out = []
    for summary in results:
        key = (summary["batch_id"], summary["isotherm_id"])
        if key not in inputs:
            continue  # inputs are written before results, so only a damaged store lands here
        entries = [fit_entry(r) for r in fits.get(key, [])]
        # best supported first; fits with no AICc (failed, too few points) last
        entries.sort(key=lambda f: (f["aicc"] is None, f["aicc"] or 0.0, f["model"] or ""))
        out.append(StoredIsotherm(summary["batch_id"], inputs[key][0], summary, entries))
    return out


def sorbent_input_count(store: Store, sorbent_id: str) -> int:
    """How many input isotherms of the sorbent the store holds, over every batch."""
    index = _index(store)
    if index is not None:
        return index.count("inputs", "sorbent_id", sorbent_id)
    data = store.dataset("inputs")
    if data is None:
        return 0
    return data.count_rows(filter=ds.field("sorbent_id") == sorbent_id)


def sorbent_tables(store: Store, sorbent_id: str) -> dict[str, pa.Table | None]:
    """The sorbent's rows of each table of ``SORBENT_TABLES``, newest batch
    first (batch ids sort by time); None for a table without a sorbent_id column."""
    index = _index(store)
    if index is not None:
        try:
            found: dict[str, pa.Table | None] = {}
            for key, table in SORBENT_TABLES:
                schema = index.schema(table)
                if schema is None or "sorbent_id" not in schema.names:
                    found[key] = None
                    continue
                rows = _indexed(store, index, table, "sorbent_id", sorbent_id,
                                ds.field("sorbent_id") == sorbent_id)
                found[key] = rows.sort_by([("batch_id", "descending")])
            return found
        except _IndexMiss:
            pass
    return _scan_sorbent_tables(store, sorbent_id)


def _scan_sorbent_tables(store: Store, sorbent_id: str) -> dict[str, pa.Table | None]:
    found: dict[str, pa.Table | None] = {}
    for key, table in SORBENT_TABLES:
        data = store.dataset(table)
        if data is None or "sorbent_id" not in data.schema.names:
            found[key] = None
            continue
        rows = data.to_table(filter=ds.field("sorbent_id") == sorbent_id)
        found[key] = rows.sort_by([("batch_id", "descending")])
    return found


def sorbent_results(store: Store, sorbent_id: str, limit: int = 10_000) -> tuple[pa.Table, int]:
    """(the sorbent's current results: latest wins, as ``rankings`` ranks them;
    how many summary rows it has over every batch, superseded ones included)."""
    current = RankingQuery(sorbent_id=sorbent_id, limit=limit)
    index = _index(store)
    if index is not None:
        try:
            rows = _indexed(store, index, "summaries", "sorbent_id", sorbent_id,
                            ds.field("sorbent_id") == sorbent_id)
            if not rows.num_rows:
                return rows, 0
            page, _ = _rank_whole_rows(rows, current)
            return page, rows.num_rows
        except _IndexMiss:
            pass
    page, _ = rankings(store, current)
    _, every = rankings(store, RankingQuery(sorbent_id=sorbent_id, limit=0, all_results=True))
    return page, every


def filter_choices(store: Store) -> dict:
    """Values the overview's filter form offers, read from every stored summary."""
    index = _index(store)
    if index is not None:
        return index.choices()
    data = store.dataset("summaries")
    if data is None:
        return {"adsorbates": [], "flags": [], "temperatures_k": []}
    flag = next((c for c in read_index.FLAG_COLUMNS if c in data.schema.names), None)
    table = data.to_table(columns=["adsorbate", "temperature_k", *([flag] if flag else [])])
    flags = pc.unique(pc.list_flatten(table[flag])).drop_null().to_pylist() if flag else []
    temperatures = pc.unique(pc.round(table["temperature_k"], 2)).drop_null().to_pylist()
    return {"adsorbates": sorted(pc.unique(table["adsorbate"]).drop_null().to_pylist()),
            "flags": sorted(flags), "temperatures_k": sorted(temperatures)}


def batch_ids(store: Store) -> list[str]:
    """Accepted batches, newest first."""
    index = _index(store)
    return store.batch_ids() if index is None else index.batch_ids()


def attach(store: Store) -> None:
    """Let the store's table listings (rankings) come from the read index."""
    _index(store)
