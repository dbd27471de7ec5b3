"""Rankings across every batch in the store.

JSON answers are pages (default 100 rows) with Link headers; CSV, Parquet
and Arrow hold every matching row unless ``limit``/``offset`` are given,
streamed (``export.py``).
"""
from __future__ import annotations

from flask import Blueprint, current_app, request

from sorbrank.worker.store import DEFAULT_RANKING_SORT, LATEST_WINS_RULE, RankingQuery, nan_to_none, ranking
from sorbrank.worker.store.readmodel import attach
from sorbrank.worker.store.rankings import UnknownAdsorbate, ranking_stream

from ..auth import require
from ..problems import Problem
from .export import PART_ROWS, page_links, paging_headers, streamed_table
from .formats import bool_arg, choice_arg, float_arg, int_arg, json_rows, negotiate

bp = Blueprint("rankings", __name__)
JSON_PAGE_ROWS = 100
MAX_LIMIT = 100_000


def ranking_query(default_limit: int | None) -> RankingQuery:
    return RankingQuery(
        adsorbate=request.args.get("adsorbate"),
        temperature_k=float_arg("temperature_k", None),
        temperature_tolerance_k=float_arg("temperature_tolerance_k", 0.5),
        flags=tuple(request.args.getlist("flag")),
        exclude_flags=tuple(request.args.getlist("exclude_flag")),
        batch_id=request.args.get("batch_id"),
        sorbent_id=request.args.get("sorbent_id"),
        sort=request.args.get("sort", DEFAULT_RANKING_SORT),
        descending=choice_arg("order", "desc", ("asc", "desc")) == "desc",
        limit=int_arg("limit", default_limit, 0, MAX_LIMIT),
        offset=int_arg("offset", 0, 0, 10**9),
        all_results=bool_arg("all"),
        unreliable_last=choice_arg("unreliable_last", "true", ("true", "false", "1", "0"))
        in ("true", "1"),
    )


def _bad_query(exc: ValueError) -> Problem:
    if isinstance(exc, UnknownAdsorbate):
        return Problem(400, "Bad Request", str(exc), slug="unknown-adsorbate",
                       parameter="adsorbate", adsorbate=exc.name, suggestions=exc.suggestions)
    return Problem(400, "Bad Request", str(exc), slug="bad-parameter", parameter="sort")


@bp.get("/rankings")
@require("read")
def get_rankings():
    fmt = negotiate()
    store = current_app.extensions["sorbrank"].store
    attach(store)  # the ranking lists the summaries through the read index (and compacted files)
    # machine formats: every matching row unless limit is given; JSON: pages
    query = ranking_query(None if fmt != "json" else JSON_PAGE_ROWS)
    rule = "all results" if query.all_results else LATEST_WINS_RULE
    try:
        ranked = (ranking_stream(store, query, PART_ROWS[fmt]) if fmt != "json"
                  else ranking(store, query))
    except ValueError as exc:
        raise _bad_query(exc) from None
    # the marker every format carries: the rows were computed at several condition sets
    headers = {**paging_headers(ranked.total, query.offset, query.limit),
               "X-Mixed-Conditions": "true" if ranked.mixed_conditions else "false"}
    if fmt != "json":
        return streamed_table(ranked.schema, ranked.parts, fmt, "rankings", headers)
    return {
        "rows": json_rows(ranked.page),
        "total": ranked.total,
        "returned": ranked.page.num_rows,
        "limit": query.limit,
        "offset": query.offset,
        "links": page_links(ranked.total, query.offset, query.limit),
        "adsorbate": ranked.query.adsorbate,
        "sort": query.sort,
        "order": "desc" if query.descending else "asc",
        "unreliable_last": query.unreliable_last,
        "reliability_column": ranked.reliability_column,
        "mixed_conditions": ranked.mixed_conditions,
        "condition_sets": nan_to_none(ranked.condition_sets),
        "deduplication": rule,
    }, 200, headers
