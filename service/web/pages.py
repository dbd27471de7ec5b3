"""HTML pages for people: the rankings across batches, and one page per sorbent.

Everything is rendered on the server from the same store queries the API
uses; filters and sorting are plain GET parameters, so every view has a URL
that can be bookmarked or pasted into a report. Errors come back as a short
HTML page, never as JSON and never as a 5xx.
"""
from __future__ import annotations

import logging
import math

from flask import Blueprint, Response, current_app, render_template, request, url_for
from werkzeug.exceptions import HTTPException

from sorbrank.worker import jobs
from sorbrank.worker.models import CATALOGUE
from sorbrank.worker.store import (DEFAULT_RANKING_SORT, LATEST_WINS_RULE, Q_SAT_MAX_RELATIVE_STDERR,
                                   RELIABILITY_OF_SORT, RankingQuery, Store, nan_to_none, ranking)
from sorbrank.worker.store.readmodel import (attach, batch_ids, filter_choices, qst_rows,
                                             sorbent_input_count, sorbent_isotherms,
                                             sorbent_results)

from ..auth import require
from ..commands.fit import pressure_swing
from ..problems import Problem

log = logging.getLogger(__name__)

bp = Blueprint("web", __name__, template_folder="templates", static_folder="static",
               static_url_path="/assets")

ROWS_PER_PAGE = 50
BATCHES_SHOWN = 20
# (summary column, header label); the unit is part of the label
COLUMNS = (
    ("sorbent_id", "Sorbent"),
    ("adsorbate", "Gas"),
    ("temperature_k", "T (K)"),
    ("best_model", "Best model"),
    ("loading_ads_mol_per_kg", "Loading at p_ads (mol/kg)"),
    ("q_sat_mol_per_kg", "q_sat (mol/kg)"),
    ("henry_mol_per_kg_pa", "Henry (mol/(kg·Pa))"),
    ("bet_area_m2_per_g", "BET area (m²/g)"),
    ("working_capacity_mol_per_kg", "Working capacity (mol/kg)"),
)
TEXT_COLUMNS = {"sorbent_id", "adsorbate", "best_model"}
DEFAULT_SORT = DEFAULT_RANKING_SORT
# scripts are never needed; images come from our own API
CONTENT_SECURITY_POLICY = ("default-src 'none'; img-src 'self'; style-src 'self'; "
                           "form-action 'self'; frame-ancestors 'none'; base-uri 'none'")


def _store() -> Store:
    return current_app.extensions["sorbrank"].store


def _bad(parameter: str, detail: str) -> Problem:
    return Problem(400, "Bad Request", detail, slug="bad-parameter", parameter=parameter)


def _text(name: str) -> str | None:
    value = request.args.get(name, "").strip()
    return value or None


def _temperature_k() -> float | None:
    raw = _text("temperature_k")
    if raw is None:
        return None
    try:
        value = float(raw)
    except ValueError:
        value = math.nan
    if not math.isfinite(value) or value <= 0:
        raise _bad("temperature_k", f"temperature {raw!r}: enter a positive number of kelvin")
    return value


def _offset() -> int:
    raw = _text("offset") or "0"
    if not raw.isdigit() or len(raw) > 12:
        raise _bad("offset", f"offset {raw!r}: expected a whole number of rows, 0 or more")
    return int(raw)


# -- template filters -------------------------------------------------------

@bp.app_template_filter("sig")
def significant(value, digits: int = 4) -> str:
    """A number to ``digits`` significant figures; a dash when there is none."""
    if value is None or isinstance(value, bool):
        return "–"
    try:
        number = float(value)
    except (TypeError, ValueError):
        return str(value)
    return f"{number:.{digits}g}" if math.isfinite(number) else "–"


@bp.app_template_filter("swing")
def swing(row: dict) -> str:
    """'1→0.1 bar, 298.15 K': the pressure swing and temperature a row's
    loadings and working capacity were computed at; a dash when unknown."""
    p_ads, p_des = row.get("adsorption_pressure_pa"), row.get("desorption_pressure_pa")
    if p_ads is None or p_des is None:
        return "–"
    return f"{pressure_swing(p_ads, p_des)}, {significant(row.get('adsorption_temperature_k'), 5)} K"


@bp.app_template_filter("bar")
def bar(pressure_pa) -> str:
    """A pressure in Pa shown in bar (process pressures are a few bar or less)."""
    return "–" if pressure_pa is None else f"{significant(pressure_pa / 1e5)} bar"


@bp.app_template_filter("model_title")
def model_title(model_id) -> str:
    model = CATALOGUE.get(model_id)
    return model.title if model is not None else (model_id or "–")


# -- responses --------------------------------------------------------------

def error_page(status: int, title: str, detail: str | None, headers: dict | None = None):
    """An HTML error page (also used by the app for unmatched page URLs)."""
    body = render_template("page_error.html", status=status, title=title, detail=detail)
    return body, status, headers or {}


@bp.errorhandler(Problem)
def _problem_page(exc: Problem):
    return error_page(exc.status, exc.title, exc.detail, exc.headers)


@bp.errorhandler(HTTPException)
def _http_page(exc: HTTPException):
    headers = {k: v for k, v in exc.get_headers() if k.lower() != "content-type"}
    return error_page(exc.code or 400, exc.name, exc.description, headers)


@bp.errorhandler(Exception)
def _unexpected_page(exc: Exception):
    log.exception("page failed")
    return error_page(500, "Internal Server Error",
                       "This page failed to render; the error is logged. Stored results are "
                       "not affected.")


@bp.after_request
def _page_headers(resp: Response) -> Response:
    if resp.mimetype == "text/html":
        resp.headers["Content-Security-Policy"] = CONTENT_SECURITY_POLICY
        resp.headers["X-Content-Type-Options"] = "nosniff"
        resp.headers["Cache-Control"] = "no-cache"
    return resp


# -- overview ---------------------------------------------------------------

def _choices(store: Store) -> dict:
    """Values the filter form offers, read from every stored summary."""
    return filter_choices(store)


def _sort_links(filters: dict, sort: str, descending: bool) -> dict:
    """Per column: the URL that sorts by it (a second click flips the order)."""
    links = {}
    for column, _ in COLUMNS:
        if column == sort:
            order = "asc" if descending else "desc"
        else:
            order = "asc" if column in TEXT_COLUMNS else "desc"
        links[column] = url_for("web.overview", **filters, sort=column, order=order)
    return links


def _batches(store: Store) -> tuple[list[dict], int]:
    ids = batch_ids(store)
    shown = [jobs.batch_status(store, b) for b in ids[:BATCHES_SHOWN]]
    return [s for s in shown if s is not None], len(ids)


@bp.get("/")
@require("read")
def overview():
    store = _store()
    filters = {"adsorbate": _text("adsorbate"), "temperature_k": _temperature_k(),
               "flag": _text("flag"), "exclude_flag": _text("exclude_flag")}
    filters = {k: v for k, v in filters.items() if v is not None}
    sort = _text("sort") or DEFAULT_SORT
    if sort not in dict(COLUMNS):
        raise _bad("sort", f"cannot sort by {sort!r}; choose one of the table's columns")
    order = _text("order") or ("asc" if sort in TEXT_COLUMNS else "desc")
    if order not in ("asc", "desc"):
        raise _bad("order", f"order {order!r}: choose asc or desc")
    offset = _offset()
    in_place = _text("unreliable_last") == "false"
    if in_place:
        filters["unreliable_last"] = "false"

    query = RankingQuery(adsorbate=filters.get("adsorbate"),
                         temperature_k=filters.get("temperature_k"),
                         flags=tuple(filter(None, [filters.get("flag")])),
                         exclude_flags=tuple(filter(None, [filters.get("exclude_flag")])),
                         sort=sort, descending=order == "desc", limit=ROWS_PER_PAGE,
                         offset=offset, unreliable_last=not in_place)
    attach(store)  # the ranking lists the summaries through the read index
    try:
        ranked = ranking(store, query)
    except ValueError as exc:  # a sort column absent from every stored summary
        raise _bad("sort", str(exc)) from None
    total = ranked.total
    rows = nan_to_none(ranked.page.to_pylist())
    here_order = {k: v for k, v in filters.items() if k != "unreliable_last"}
    toggle_url = url_for("web.overview", **here_order, sort=sort, order=order,
                         **({} if in_place else {"unreliable_last": "false"}))

    here = {**filters, "sort": sort, "order": order}
    previous_url = (url_for("web.overview", **here, offset=max(offset - ROWS_PER_PAGE, 0))
                    if offset > 0 else None)
    next_url = (url_for("web.overview", **here, offset=offset + ROWS_PER_PAGE)
                if offset + ROWS_PER_PAGE < total else None)
    batches, batch_total = _batches(store)
    return render_template(
        "page_overview.html", rows=rows, total=total, offset=offset, columns=COLUMNS,
        filters=filters, sort=sort, descending=order == "desc",
        sort_links=_sort_links(filters, sort, order == "desc"), choices=_choices(store),
        previous_url=previous_url, next_url=next_url, batches=batches,
        batch_total=batch_total, rule=LATEST_WINS_RULE,
        reliability=RELIABILITY_OF_SORT.get(sort), unreliable_last=not in_place,
        toggle_url=toggle_url, condition_sets=nan_to_none(ranked.condition_sets),
        mixed_conditions=ranked.mixed_conditions,
        max_relative_stderr_percent=round(Q_SAT_MAX_RELATIVE_STDERR * 100))


# -- one sorbent -----------------------------------------------------------

def _param_units(model_id: str) -> dict[str, str]:
    model = CATALOGUE.get(model_id)
    return {p.name: p.unit for p in model.params} if model is not None else {}


@bp.get("/sorbents/<path:sorbent_id>")
@require("read")
def sorbent(sorbent_id: str):
    store = _store()
    current, every_total = sorbent_results(store, sorbent_id)
    results = sorted(nan_to_none(current.to_pylist()),
                     key=lambda r: (r["adsorbate"] or "", r["temperature_k"] or 0.0,
                                    r["isotherm_id"] or ""))
    inputs_total = sorbent_input_count(store, sorbent_id)
    if not results and not inputs_total:
        raise Problem(404, "Not Found", f"No sorbent {sorbent_id!r} in any batch.")
    isotherms = sorbent_isotherms(store, sorbent_id, results)
    return render_template(
        "page_sorbent.html", sorbent_id=sorbent_id, isotherms=isotherms,
        superseded=every_total - len(results), unfitted=max(inputs_total - every_total, 0),
        qst=qst_rows(store, sorbent_id), param_units=_param_units, rule=LATEST_WINS_RULE)
