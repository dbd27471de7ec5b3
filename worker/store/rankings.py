"""Rankings across every batch: latest wins, flag filters, the page."""
from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any, Callable, Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds

from .. import adsorbates
from ..arrays import BoolArray, IntArray
from .reliability import (_RELIABILITY_RULES, RELIABILITY_OF_SORT, _column_list, condition_sets,
                          conditions_of_sort, reliable_rows, rows_with_flag,
                          with_ranking_columns)
from . import compaction
from .latest import latest_rows, latest_wins_by_sorting
from .tables import Store, TableSnapshot

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
    limit: int | None = 100              # None: every row from ``offset`` on
    offset: int = 0
    all_results: bool = False
    # rows whose sorted figure is not supported by the data come after the rest
    unreliable_last: bool = True


# The default ranking leads with a figure inside the measured range: the
# loading at the batch's adsorption pressure, at the isotherm's own
# temperature (docs/results.md, "Default ranking").
DEFAULT_RANKING_SORT = "loading_ads_mol_per_kg"


class UnknownAdsorbate(ValueError):
    """An adsorbate filter that names no gas intake would accept (nor any
    gas a batch declared): answered as a bad parameter, never as 0 rows."""

    def __init__(self, name: str, suggestions: list[str]):
        self.name, self.suggestions = name, suggestions
        hint = ("; did you mean " + " or ".join(map(repr, suggestions)) + "?") if suggestions else ""
        super().__init__(f"adsorbate={name!r} is not a known gas (nor one a batch declared)"
                         + hint)


def canonical_adsorbate(name: str, stored: Callable[[], list[str]] = list) -> str:
    """The adsorbate as intake stores it: ``co2`` and ``carbon dioxide`` are
    ``CO2``. A name the gas table lacks may be a gas a batch declared: it
    matches one of the names ``stored()`` gives (the adsorbates in the store)
    the way intake matches declared gases. Raises UnknownAdsorbate when
    neither knows it."""
    found = adsorbates.lookup(name)
    if found is None:
        declared = [adsorbates.Adsorbate(s, (), 0.0, None, None, None, declared=True)
                    for s in stored() if isinstance(s, str)]
        found = adsorbates.lookup(name, declared=declared) if declared else None
    if found is None:
        raise UnknownAdsorbate(name, adsorbates.suggestions(name))
    return found.id


def _stored_adsorbates(snap: TableSnapshot) -> list[str]:
    if snap.dataset is None or "adsorbate" not in snap.dataset.schema.names:
        return []
    column = snap.key_columns(["adsorbate"])["adsorbate"]
    return [v for v in pc.unique(column).to_pylist() if v is not None]


def _resolved(query: RankingQuery, snap: TableSnapshot) -> RankingQuery:
    if query.adsorbate is None:
        return query
    return replace(query, adsorbate=canonical_adsorbate(
        query.adsorbate, lambda: _stored_adsorbates(snap)))


def sortable_columns(schema: pa.Schema) -> list[str]:
    return [f.name for f in schema
            if not (pa.types.is_nested(f.type) or pa.types.is_binary(f.type))
            and not f.name.startswith("_")]


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
    return _rank_snapshot(*_snapshot_for(store, query), store)


def _rank_snapshot(snap: TableSnapshot, query: RankingQuery, store: "Store | None" = None
                   ) -> tuple[pa.Table, int, pa.Table]:
    if compaction.is_compacted(snap):  # through compacted summaries (compaction.py)
        try:
            found = _rank_keys(snap, query)
            if found is not None and snap.dataset is not None:
                page, total, ranked, rows_snap = found
                rows = _whole_rows(rows_snap, page) if page.num_rows else \
                    snap.dataset.schema.empty_table()
                if rows is not None:
                    return rows, total, ranked
        except (OSError, pa.ArrowException):
            pass  # a compacted file merged away under the query (or damaged)
        if store is None:
            raise ValueError("a ranking over compacted summaries needs its store to fall back on")
        snap = store.snapshot("summaries")   # the full scan: slower, the same rows
    keys = _rank_keys(snap, query)
    if keys is not None and snap.dataset is not None:  # keys imply a dataset
        page, total, ranked, _ = keys
        rows = _whole_rows(snap, page) if page.num_rows else snap.dataset.schema.empty_table()
        if rows is not None:
            return rows, total, ranked
    return _rank_by_whole_rows(snap, query)


def _snapshot_for(store: "Store", query: RankingQuery) -> tuple[TableSnapshot, RankingQuery]:
    """The summaries as one listing found them, and the query with its
    adsorbate in canonical form and its sort column checked."""
    snap = compaction.snapshot(store) or store.snapshot("summaries")
    query = _resolved(query, snap)
    data = snap.dataset
    if data is not None and query.sort not in sortable_columns(data.schema):
        raise ValueError(f"cannot sort by {query.sort!r}; sortable columns: "
                         + ", ".join(sortable_columns(data.schema)))
    return snap, query


def _rank_keys(snap: TableSnapshot, query: RankingQuery
               ) -> tuple[pa.Table, int, pa.Table, TableSnapshot] | None:
    """The ranked page as key columns with each row's ``_file`` and ``_row``
    (``_whole_rows`` reads them whole from the snapshot returned last), the
    total and the ranked rows; None where only the whole-row path applies."""
    data = snap.dataset
    if data is None or not all(name in data.schema.names for name in _RANKING_KEYS):
        return None
    return _rank_cached(snap, query)


def _rank_by_whole_rows(snap: TableSnapshot, query: RankingQuery
                        ) -> tuple[pa.Table, int, pa.Table]:
    data = snap.dataset
    if data is None:
        return pa.table({}), 0, pa.table({})
    where: ds.Expression | None = None

    def both(expr: ds.Expression) -> ds.Expression:
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
    return _ranked_whole_rows(data.to_table(filter=where), query)


def _flag_filter(table: pa.Table, query: RankingQuery) -> pa.Table:
    keep = np.ones(table.num_rows, dtype=bool)
    for name in query.flags:
        keep &= rows_with_flag(table["quality_flags"], name)
    for name in query.exclude_flags:
        keep &= ~rows_with_flag(table["quality_flags"], name)
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
        rows = latest_rows(table)
        if rows is None:
            table = latest_wins_by_sorting(table)
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


def _page_of(table: pa.Table, rows: IntArray | None, query: RankingQuery) -> tuple[pa.Table, int]:
    """The requested page of ``table`` (of its ``rows`` only, when given) in
    ranking order, and how many rows were ranked.

    Only the rows that can reach the page are sorted whole: with a float sort
    column they are the ones at or beyond the page's last value (ties kept,
    so the tie-breaking order is untouched); NaN and null sort last and are
    needed only when fewer finite values than the page's end exist."""
    total = table.num_rows if rows is None else len(rows)
    limit = total if query.limit is None else max(query.limit, 0)
    end = max(query.offset, 0) + limit
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
    return table.slice(max(query.offset, 0), limit), total


def _rank_cached(snap: TableSnapshot, query: RankingQuery
                 ) -> tuple[pa.Table, int, pa.Table, TableSnapshot] | None:
    """Rank on the kept key columns: the page as key columns with ``_file``
    and ``_row``, and the snapshot they number the files of; None when the
    store needs the whole-row path. A compacted snapshot's key columns come
    from its compacted and per-batch files (``compaction.key_source``)."""
    data, fragments = snap.dataset, snap.fragments
    if data is None:  # _rank_keys has checked: never here
        return None
    if snap.own_batch_column:
        return None  # a file carrying its own batch_id: let the dataset reconcile it
    names = [n for n in _RANKING_KEYS if n != "batch_id"]
    names += [c for c in ("branch",) if c in data.schema.names]
    if (query.flags or query.exclude_flags) and "quality_flags" in data.schema.names:
        names.append("quality_flags")
    if query.sort not in names and query.sort != "batch_id":
        names.append(query.sort)
    reliability = RELIABILITY_OF_SORT.get(query.sort) if query.unreliable_last else None
    if reliability is not None:  # what the sorted figure's reliability is judged on
        values, _ = _RELIABILITY_RULES[reliability]
        names += [n for n in (*values, "quality_flags") if n in data.schema.names and n not in names]
    source = compaction.key_source(snap, names)
    if source is not None:
        columns = source.columns
        file_of_row, row_in_file, batch_of_row = (source.file_of_row, source.row_in_file,
                                                  source.batch_of_row)
        rows_snap = source.snapshot
    else:
        columns = snap.key_columns(names)
        lengths = snap.lengths  # set by key_columns
        if lengths is None:
            return None
        file_of_row = np.repeat(np.arange(len(fragments), dtype=np.int64), lengths)
        starts = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64)
        row_in_file = np.arange(len(file_of_row), dtype=np.int64) - starts[file_of_row]
        batch_of_row = None
        rows_snap = snap

    # the filters that choose the competitors, as one mask (null counts as false)
    mask: BoolArray | None = None

    def both(condition: pa.Array | pa.ChunkedArray | BoolArray) -> BoolArray:
        condition = np.asarray(condition.fill_null(False).to_numpy(zero_copy_only=False)
                               if not isinstance(condition, np.ndarray) else condition, bool)
        return condition if mask is None else mask & condition

    if query.batch_id is not None and batch_of_row is not None:
        mask = both(pc.equal(batch_of_row, query.batch_id))
    elif query.batch_id is not None:  # a partition value: decided per file
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
    if mask is None:
        chosen = np.arange(len(file_of_row))
        table = pa.table({name: columns[name] for name in names})
    else:
        chosen = np.flatnonzero(mask)
        picks = pa.array(chosen)
        table = pa.table({name: columns[name].take(picks) for name in names})
    files = file_of_row[chosen]
    batch_ids = pa.array(snap.batch_of_file, pa.string()).take(pa.array(files)) \
        if batch_of_row is None else (batch_of_row if mask is None
                                      else batch_of_row.take(pa.array(chosen)))
    table = table.append_column("_file", pa.array(files)).append_column(
        "_row", pa.array(row_in_file[chosen])).append_column("batch_id", batch_ids)
    return (*_ranked_whole_rows(table, query), rows_snap)


def _whole_rows(snap: TableSnapshot, page: pa.Table) -> pa.Table | None:
    """The rows ``page`` names by ``_file`` and ``_row``, read whole from the
    row groups that hold them, in the page's order; None when the files
    changed under the query."""
    data, fragments = snap.dataset, snap.fragments
    if data is None:
        return None
    file_no = page["_file"].to_numpy()
    row_no = page["_row"].to_numpy()
    subsets = []
    pieces: list[IntArray] = []
    for f in np.unique(file_no):
        fragment = fragments[f]
        sizes = np.array([rg.num_rows for rg in fragment.row_groups], dtype=np.int64)
        bounds = np.concatenate([[0], np.cumsum(sizes)])
        groups = np.unique(np.searchsorted(bounds, row_no[file_no == f], side="right") - 1)
        subsets.append(fragment.subset(row_group_ids=[int(g) for g in groups]))
        pieces.extend(f * (1 << 32) + np.arange(bounds[g], bounds[g + 1]) for g in groups)
    rows = ds.FileSystemDataset(subsets, data.schema, data.format, data.filesystem).to_table()
    expected = np.concatenate(pieces)
    wanted = file_no * (1 << 32) + row_no
    if rows.num_rows != len(expected):
        return None  # the files changed under the query: rank again over whole rows
    at = np.searchsorted(expected, wanted)
    if np.any(at >= len(expected)) or np.any(expected[np.minimum(at, len(expected) - 1)] != wanted):
        return None
    return rows.take(pa.array(at)).replace_schema_metadata(data.schema.metadata)


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
    condition_sets: list[dict[str, Any]]
    # the query as applied: its adsorbate in the canonical form intake stores
    query: RankingQuery | None = None

    @property
    def mixed_conditions(self) -> bool:
        return len(self.condition_sets) > 1


def _readers_page(store: "Store", page: pa.Table) -> pa.Table:
    pressures = [store.batch_pressures(b) for b in _column_list(page, "batch_id")]
    return with_ranking_columns(page, pressures)


def _condition_sets(store: "Store", ranked: pa.Table, query: RankingQuery) -> list[dict[str, Any]]:
    return condition_sets(ranked, store.batch_pressures, conditions_of_sort(query.sort),
                          abs(query.temperature_tolerance_k))


def ranking(store: "Store", query: RankingQuery) -> Ranking:
    """``rankings`` plus, on every row, the conditions behind its loadings and
    working capacity and the reliability columns; and which condition sets
    the ranked rows span for the sorted figure."""
    snap, query = _snapshot_for(store, query)
    page, total, ranked = _rank_snapshot(snap, query, store)
    return Ranking(_readers_page(store, page), total, query.sort, query.unreliable_last,
                   RELIABILITY_OF_SORT.get(query.sort), _condition_sets(store, ranked, query),
                   query)


# rows per part of a streamed ranking: what is encoded at a time
STREAM_PART_ROWS = 10_000


@dataclass
class RankingStream:
    """A ranking handed out part by part: ``parts`` yields tables of
    ``schema`` (the columns of ``ranking``'s page), at most ``part_rows``
    rows each, ``returned`` rows in all, in ranking order; it can be
    consumed once.

    The ranking runs once, on the key columns, and the ranked rows are then
    read whole once, as Arrow (the row groups that hold them, each read
    once), before the first part: a damaged file fails the request before an
    answer starts. Reading them part by part instead would read every row
    group again for each part, since the ranking order crosses all files.
    What stays small is everything after that: each part gets its condition
    and reliability columns, and is encoded, only when it is asked for."""

    total: int                # ranked rows before offset and limit
    returned: int             # rows the parts hold
    schema: pa.Schema
    query: RankingQuery       # as applied (canonical adsorbate)
    reliability_column: str | None
    condition_sets: list[dict[str, Any]]
    parts: Iterator[pa.Table]

    @property
    def mixed_conditions(self) -> bool:
        return len(self.condition_sets) > 1


def ranking_stream(store: "Store", query: RankingQuery,
                   part_rows: int = STREAM_PART_ROWS) -> RankingStream:
    """The rows ``ranking`` gives for ``query`` (``limit=None``: every ranked
    row from ``offset`` on), as a stream of parts for a complete export."""
    if part_rows < 1:
        raise ValueError(f"part_rows must be 1 or more, not {part_rows}")
    snap, query = _snapshot_for(store, query)
    empty = snap.dataset.schema.empty_table() if snap.dataset is not None else pa.table({})
    schema = _readers_page(store, empty).schema
    rows, total, ranked = _rank_snapshot(snap, query, store)

    def parts() -> Iterator[pa.Table]:
        for start in range(0, max(rows.num_rows, 1), part_rows):
            part = _readers_page(store, rows.slice(start, part_rows) if rows.num_rows else empty)
            if not part.schema.equals(schema):
                part = part.select(schema.names).cast(schema)
            yield part

    return RankingStream(total, rows.num_rows, schema, query, RELIABILITY_OF_SORT.get(query.sort),
                         _condition_sets(store, ranked, query), parts())
