"""The query parameters every endpoint takes, declared once.

``ACCEPTED`` maps each Flask endpoint (API, plots, pages, probes) to the
query parameters it reads. ``register`` checks every request against it
before the view runs (a request without the token a view needs hears its
401 first): a parameter the endpoint does not take answers 400
(problem ``unknown-parameter``, naming each one and listing the accepted
ones) instead of being ignored, so a misspelt filter never returns
unfiltered rows. The app refuses to start while an endpoint is missing
here, so a new endpoint cannot forget its declaration; the OpenAPI document
(``service/openapi.py``) builds its query parameters from the same list.
"""
from __future__ import annotations

import difflib
from dataclasses import dataclass, field

from flask import Flask, current_app, request

from sorbrank.worker.store import BATCH_ID_PATTERN

from ..problems import Problem


@dataclass(frozen=True)
class Param:
    name: str
    description: str
    schema: dict = field(default_factory=lambda: {"type": "string"})
    repeatable: bool = False  # flag=a&flag=b; any other name may appear once

    def openapi(self) -> dict:
        doc = {"name": self.name, "in": "query", "required": False,
               "description": self.description}
        if self.repeatable:
            doc.update(schema={"type": "array", "items": self.schema}, style="form",
                       explode=True)
        else:
            doc["schema"] = self.schema
        return doc


TABLE_FORMAT = Param("format", "response format; otherwise the Accept header decides "
                     "(arrow = Arrow IPC stream)",
                     {"type": "string", "enum": ["json", "csv", "parquet", "arrow"]})
IMAGE_FORMAT = Param("format", "image format",
                     {"type": "string", "enum": ["svg", "png"], "default": "svg"})

RANKINGS = (
    Param("adsorbate", "only this gas, matched in the canonical form intake stores (co2, "
          "CO2 and 'carbon dioxide' are the same gas); a name intake does not know, and "
          "no batch declared, answers 400 naming it"),
    Param("temperature_k", "only isotherms measured within temperature_tolerance_k of this "
          "temperature, K", {"type": "number"}),
    Param("temperature_tolerance_k", "half-width of the temperature window, K",
          {"type": "number", "default": 0.5}),
    Param("flag", "keep rows carrying this quality flag (repeatable: all must be present)",
          repeatable=True),
    Param("exclude_flag", "drop rows carrying this quality flag (repeatable)", repeatable=True),
    Param("batch_id", "only results of this batch"),
    Param("sorbent_id", "only results of this sorbent"),
    Param("sort", "any summary column, e.g. loading_ads_mol_per_kg (the loading at the "
          "batch's adsorption pressure), working_capacity_mol_per_kg, q_sat_mol_per_kg, "
          "henry_mol_per_kg_pa", {"type": "string", "default": "loading_ads_mol_per_kg"}),
    Param("unreliable_last", "rows whose sorted figure is unreliable (an extrapolation, or a "
          "q_sat with a relative standard error above 25 %; columns *_reliable) come after "
          "the rest; false ranks them in place", {"type": "boolean", "default": True}),
    Param("order", "sort direction", {"type": "string", "enum": ["asc", "desc"],
                                      "default": "desc"}),
    Param("limit", "rows per response; JSON default 100 (then Link rel=next), CSV, Parquet "
          "and Arrow default every matching row",
          {"type": "integer", "minimum": 0, "maximum": 100000}),
    Param("offset", "rows to skip", {"type": "integer", "minimum": 0, "default": 0}),
    Param("all", "every result instead of one per sorbent, adsorbate, branch and temperature",
          {"type": "boolean", "default": False}),
    TABLE_FORMAT,
)

SUBMIT = (
    Param("format", "body format when Content-Type does not say (application/octet-stream)",
          {"type": "string", "enum": ["csv", "json", "parquet"]}),
    Param("units", "units of plain pressure/loading columns that do not name their own (a "
          "column such as pressure_kpa carries its unit), e.g. pressure:kPa,loading:mmol/g; "
          "see docs/formats.md", {"type": "string", "example": "pressure:kPa,loading:mmol/g"}),
    Param("sample_mass_g", "sample mass in g, for absolute loadings (e.g. loading_mmol) where "
          "the body gives none", {"type": "number", "exclusiveMinimum": 0}),
    Param("delimiter", "CSV delimiter; detected from the header line when left out",
          {"type": "string", "enum": ["comma", "semicolon", "tab", ",", ";"]}),
    Param("decimal", "CSV decimal mark; a comma only in files not comma-delimited; detected "
          "when left out", {"type": "string", "enum": ["point", "comma", ".", ","]}),
    Param("batch_label", "a name for the batch"),
    Param("models", "'all' or comma-separated model ids (see /api/v1/models)",
          {"type": "string", "default": "all"}),
    Param("criterion", "model selection criterion",
          {"type": "string", "enum": ["aicc", "aic", "bic"], "default": "aicc"}),
    Param("weighting", "least-squares weighting"),
    Param("absolute_sigma", "with weighting=sigma: the sigma is calibrated; covariance not "
          "rescaled, chi-square reported (docs/results.md)", {"type": "boolean",
                                                                "default": False}),
)

LIST_BATCHES = (
    Param("state", "only batches in this state", {"$ref": "#/components/schemas/State"}),
    Param("limit", "batches per page (then Link rel=next)",
          {"type": "integer", "minimum": 1, "maximum": 1000, "default": 50}),
    Param("offset", "batches to skip", {"type": "integer", "minimum": 0, "default": 0}),
)

BATCH_RESULTS = (
    TABLE_FORMAT,
    Param("table", "which table (the tabular formats hold one, default summary)",
          {"type": "string", "enum": ["summary", "fits", "sorbents"]}),
)

ISOTHERM_PLOT = (
    Param("kind", "which plot", {"type": "string", "enum": ["isotherm", "langmuir-linear", "bet"],
                                 "default": "isotherm"}),
    IMAGE_FORMAT,
    Param("log_pressure", "logarithmic pressure axis (kind=isotherm)",
          {"type": "boolean", "default": False}),
    Param("batch_id", "the batch to draw from; default the newest holding it",
          {"type": "string", "pattern": BATCH_ID_PATTERN.pattern}),
)

QST_PLOT = (Param("adsorbate", "only this gas"), IMAGE_FORMAT)

OVERVIEW_PAGE = tuple(Param(name, text) for name, text in (
    ("adsorbate", "only this gas (canonical form, as for /api/v1/rankings)"),
    ("temperature_k", "only this temperature, K"),
    ("flag", "only rows with this flag"), ("exclude_flag", "no rows with this flag"),
    ("sort", "column to sort by"), ("order", "asc or desc"), ("offset", "rows to skip"),
    ("unreliable_last", "false ranks rows with an unreliable sorted figure in place")))

# endpoint -> the query parameters it reads; () takes none
ACCEPTED: dict[str, tuple[Param, ...]] = {
    "batches.submit_batch": SUBMIT,
    "batches.list_batches": LIST_BATCHES,
    "batches.get_batch": (),
    "batches.get_results": BATCH_RESULTS,
    "rankings.get_rankings": RANKINGS,
    "sorbents.get_sorbent": (),
    "models.list_models": (),
    "plots.isotherm_plot": ISOTHERM_PLOT,
    "plots.qst_plot": QST_PLOT,
    "web.overview": OVERVIEW_PAGE,
    "web.sorbent": (),
    "web.static": (),
    "static": (),  # Flask's own static route
    "health.healthz": (),
    "health.readyz": (),
    "openapi_document": (),
    "prometheus_metrics": (),
}

# parameters an endpoint once read: the 400 says what replaced them
RETIRED: dict[str, dict[str, str]] = {
    "batches.submit_batch": {
        "pressure_unit": "units=pressure:<unit> (e.g. units=pressure:kPa,loading:mmol/g)",
        "loading_unit": "units=loading:<unit> (e.g. units=pressure:kPa,loading:mmol/g)"},
}


def query_parameters(endpoint: str) -> list[dict]:
    """The endpoint's query parameters as OpenAPI parameter objects."""
    return [p.openapi() for p in ACCEPTED[endpoint]]


def check_query() -> None:
    """Refuse a query parameter the endpoint does not take, or one given
    twice that is read once; unmatched URLs are left to the router (404/405)."""
    if request.url_rule is None or request.endpoint is None or _refused_for_no_token():
        return
    declared = ACCEPTED.get(request.endpoint, ())
    accepted = {p.name: p for p in declared}
    names = list(dict.fromkeys(request.args.keys()))
    unknown = [n for n in names if n not in accepted]
    if unknown:
        raise unknown_parameters(request.endpoint, unknown, list(accepted))
    repeated = [n for n in names if not accepted[n].repeatable and len(request.args.getlist(n)) > 1]
    if repeated:
        raise Problem(400, "Bad Request", "given more than once, read once: "
                      + ", ".join(repeated), slug="repeated-parameter",
                      parameter=", ".join(repeated), repeated=repeated)


def _refused_for_no_token() -> bool:
    """The view needs a token and none valid came: its 401 comes first, so a
    caller without access learns nothing about the parameters."""
    view = current_app.view_functions[request.endpoint]
    if getattr(view, "required_scope", None) is None:
        return False
    auth = current_app.extensions["sorbrank"].auth
    return not auth.open and auth.identify(request.headers.get("Authorization")) is None


def unknown_parameters(endpoint: str, unknown: list[str], accepted: list[str]) -> Problem:
    retired = RETIRED.get(endpoint, {})
    parts, suggestions = [], {}
    for name in unknown:
        if name in retired:
            parts.append(f"{name!r} (no longer read: use {retired[name]})")
            continue
        near = difflib.get_close_matches(name, accepted, n=1, cutoff=0.75)
        if near:
            suggestions[name] = near[0]
        parts.append(f"{name!r}" + (f" (did you mean {near[0]!r}?)" if near else ""))
    takes = ", ".join(accepted) if accepted else "no query parameters"
    detail = ("unknown query parameter" + ("s " if len(unknown) > 1 else " ") + "; ".join(parts)
              + f"; this endpoint takes {takes}")
    # "parameter" as in every other bad-parameter problem; "unknown" lists them one by one
    return Problem(400, "Bad Request", detail, slug="unknown-parameter",
                   parameter=", ".join(unknown), unknown=unknown,
                   accepted=accepted, **({"suggestions": suggestions} if suggestions else {}))


def register(app: Flask) -> None:
    """Check every request's query parameters; refuse to build an app with an
    endpoint that has no declaration here."""
    missing = sorted(set(app.view_functions) - set(ACCEPTED))
    if missing:
        raise RuntimeError("endpoints without a query parameter declaration in "
                           f"service/api/params.py: {', '.join(missing)}")
    app.before_request(check_query)
