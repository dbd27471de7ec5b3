"""Rankings across every batch in the store."""
from __future__ import annotations

from flask import Blueprint, current_app, request

from sorbrank.worker.store import (DEFAULT_RANKING_SORT, LATEST_WINS_RULE, RankingQuery,
                                   nan_to_none, ranking)

from ..auth import require
from ..problems import Problem
from .formats import bool_arg, choice_arg, float_arg, int_arg, json_rows, negotiate, table_response

bp = Blueprint("rankings", __name__)


def ranking_query() -> RankingQuery:
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
        limit=int_arg("limit", 100, 0, 100_000),
        offset=int_arg("offset", 0, 0, 10**9),
        all_results=bool_arg("all"),
        unreliable_last=choice_arg("unreliable_last", "true", ("true", "false", "1", "0"))
        in ("true", "1"),
    )


@bp.get("/rankings")
@require("read")
def get_rankings():
    query = ranking_query()
    fmt = negotiate()
    try:
        ranked = ranking(current_app.extensions["sorbrank"].store, query)
    except ValueError as exc:
        raise Problem(400, "Bad Request", str(exc), slug="bad-parameter", parameter="sort")
    page, total = ranked.page, ranked.total
    rule = "all results" if query.all_results else LATEST_WINS_RULE
    # the marker every format carries: the rows were computed at several condition sets
    headers = {"X-Total-Count": str(total),
               "X-Mixed-Conditions": "true" if ranked.mixed_conditions else "false"}
    if fmt != "json":
        return table_response(page, fmt, "rankings", headers)
    return {
        "rows": json_rows(page),
        "total": total,
        "limit": query.limit,
        "offset": query.offset,
        "sort": query.sort,
        "order": "desc" if query.descending else "asc",
        "unreliable_last": query.unreliable_last,
        "reliability_column": ranked.reliability_column,
        "mixed_conditions": ranked.mixed_conditions,
        "condition_sets": nan_to_none(ranked.condition_sets),
        "deduplication": rule,
    }, 200, headers
