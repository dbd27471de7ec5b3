"""The OpenAPI 3.1 description of the HTTP API, kept beside the code it describes.

A test checks that every registered Flask route appears here and that the
document validates, so the two cannot drift apart silently.
"""
from __future__ import annotations

from sorbrank.worker.store import BATCH_ID_PATTERN, LATEST_WINS_RULE

TABULAR = {
    "application/json": {"schema": {"type": "object"}},
    "text/csv": {"schema": {"type": "string"}},
    "application/vnd.apache.parquet": {"schema": {"type": "string", "contentMediaType":
                                                  "application/vnd.apache.parquet"}},
    "application/vnd.apache.arrow.stream": {"schema": {"type": "string", "contentMediaType":
                                                       "application/vnd.apache.arrow.stream"}},
}


def _problem(description: str) -> dict:
    return {"description": description,
            "content": {"application/problem+json": {"schema": {"$ref": "#/components/schemas/Problem"}}}}


def _ref(name: str) -> dict:
    return {"$ref": f"#/components/parameters/{name}"}


def _query(name: str, description: str, schema: dict) -> dict:
    return {"name": name, "in": "query", "required": False, "description": description,
            "schema": schema}


AUTH_ERRORS = {"401": _problem("missing or invalid bearer token"),
               "403": _problem("the token lacks the needed scope")}
READ = [{"bearer": ["read"]}]
SUBMIT = [{"bearer": ["submit"]}]

RANKING_PARAMS = [
    _query("adsorbate", "only this adsorbate (e.g. CO2)", {"type": "string"}),
    _query("temperature_k", "only isotherms measured within temperature_tolerance_k of this "
           "temperature, K", {"type": "number"}),
    _query("temperature_tolerance_k", "half-width of the temperature window, K",
           {"type": "number", "default": 0.5}),
    _query("flag", "keep rows carrying this quality flag (repeatable: all must be present)",
           {"type": "string"}),
    _query("exclude_flag", "drop rows carrying this quality flag (repeatable)", {"type": "string"}),
    _query("batch_id", "only results of this batch", {"type": "string"}),
    _query("sorbent_id", "only results of this sorbent", {"type": "string"}),
    _query("sort", "any summary column, e.g. loading_ads_mol_per_kg (the loading at the "
           "batch's adsorption pressure), working_capacity_mol_per_kg, q_sat_mol_per_kg, "
           "henry_mol_per_kg_pa", {"type": "string", "default": "loading_ads_mol_per_kg"}),
    _query("unreliable_last", "rows whose sorted figure is unreliable (an extrapolation, or a "
           "q_sat with a relative standard error above 25 %; columns *_reliable) come after "
           "the rest; false ranks them in place", {"type": "boolean", "default": True}),
    _query("order", "sort direction", {"type": "string", "enum": ["asc", "desc"], "default": "desc"}),
    _query("limit", "rows per page", {"type": "integer", "minimum": 0, "maximum": 100000,
                                      "default": 100}),
    _query("offset", "rows to skip", {"type": "integer", "minimum": 0, "default": 0}),
    _query("all", "every result instead of one per sorbent, adsorbate, branch and temperature",
           {"type": "boolean", "default": False}),
    _ref("format"),
]


IMAGES = {"image/svg+xml": {"schema": {"type": "string"}},
          "image/png": {"schema": {"type": "string", "contentMediaType": "image/png"}}}
HTML = {"text/html": {"schema": {"type": "string"}}}
IMAGE_FORMAT = _query("format", "image format", {"type": "string", "enum": ["svg", "png"],
                                                 "default": "svg"})
# plots of stored results, and the HTML pages (errors there are HTML pages too)
PLOT_AND_PAGE_PATHS = {
    "/api/v1/isotherms/{isotherm_id}/plot": {
        "get": {
            "operationId": "plotIsotherm",
            "summary": "One stored isotherm drawn with its stored fits",
            "description": "isotherm: points, selected and runner-up model, residuals; "
                           "langmuir-linear: 1/q against 1/p with the linearised Langmuir line; "
                           "bet: BET transform with the chosen p/p0 range (needs a saturation "
                           "pressure). SVG groups carry ids naming each series.",
            "security": READ,
            "parameters": [
                {"name": "isotherm_id", "in": "path", "required": True,
                 "schema": {"type": "string"}},
                _query("kind", "which plot", {"type": "string", "enum": [
                    "isotherm", "langmuir-linear", "bet"], "default": "isotherm"}),
                IMAGE_FORMAT,
                _query("log_pressure", "logarithmic pressure axis (kind=isotherm)",
                       {"type": "boolean", "default": False}),
                _query("batch_id", "the batch to draw from; default the newest holding it",
                       {"type": "string", "pattern": BATCH_ID_PATTERN.pattern}),
            ],
            "responses": {"200": {"description": "the plot", "content": IMAGES},
                          "400": _problem("bad parameter"), **AUTH_ERRORS,
                          "404": _problem("no such isotherm (in that batch)"),
                          "422": _problem("this plot cannot be drawn for this isotherm, e.g. "
                                          "BET without a saturation pressure")},
        },
    },
    "/api/v1/sorbents/{sorbent_id}/qst-plot": {
        "get": {
            "operationId": "plotIsostericHeat",
            "summary": "Isosteric heat against loading, one curve per gas (newest batch)",
            "security": READ,
            "parameters": [
                {"name": "sorbent_id", "in": "path", "required": True,
                 "schema": {"type": "string"}},
                _query("adsorbate", "only this gas", {"type": "string"}),
                IMAGE_FORMAT,
            ],
            "responses": {"200": {"description": "the plot", "content": IMAGES},
                          "400": _problem("bad parameter"), **AUTH_ERRORS,
                          "404": _problem("no isosteric heat stored for this sorbent")},
        },
    },
    "/": {
        "get": {"operationId": "pageRankings", "summary": "HTML page: rankings and batches",
                "security": READ,
                "parameters": [_query(n, d, {"type": "string"}) for n, d in (
                    ("adsorbate", "only this gas"), ("temperature_k", "only this temperature, K"),
                    ("flag", "only rows with this flag"), ("exclude_flag", "no rows with this flag"),
                    ("sort", "column to sort by"), ("order", "asc or desc"),
                    ("offset", "rows to skip"))],
                "responses": {"200": {"description": "the page", "content": HTML},
                              "400": {"description": "bad parameter (HTML page)", "content": HTML},
                              "401": {"description": "no read access (HTML page)", "content": HTML}}},
    },
    "/sorbents/{sorbent_id}": {
        "get": {"operationId": "pageSorbent",
                "summary": "HTML page: one sorbent's results, plots and fits",
                "security": READ,
                "parameters": [{"name": "sorbent_id", "in": "path", "required": True,
                                "schema": {"type": "string"}}],
                "responses": {"200": {"description": "the page", "content": HTML},
                              "401": {"description": "no read access (HTML page)", "content": HTML},
                              "404": {"description": "unknown sorbent (HTML page)",
                                      "content": HTML}}},
    },
    "/assets/{filename}": {
        "get": {"operationId": "pageAsset", "summary": "Stylesheet of the HTML pages",
                "security": [],
                "parameters": [{"name": "filename", "in": "path", "required": True,
                                "schema": {"type": "string"}}],
                "responses": {"200": {"description": "the file"},
                              "404": {"description": "no such file (HTML page)",
                                      "content": HTML}}},
    },
}


def document() -> dict:
    return {
        "openapi": "3.1.0",
        "info": {
            "title": "sorbrank API",
            "version": "1",
            "description": (
                "Submit batches of gas-adsorption isotherms; sorbrank fits its model catalogue, "
                "selects a model per isotherm by an information criterion, computes screening "
                "metrics and ranks sorbents across every batch. Units everywhere: pressure Pa, "
                "temperature K, loading mol/kg, energy J/mol, area m2/g. Errors are problem "
                "details (RFC 9457). Rankings: " + LATEST_WINS_RULE + "."),
        },
        "servers": [{"url": "/"}],
        "security": [{"bearer": []}],
        "paths": {
            "/api/v1/batches": {
                "post": {
                    "operationId": "submitBatch",
                    "summary": "Submit a batch of isotherms",
                    "description": "Answers 202 only once the normalised inputs are on disk. "
                                   "Isotherms with problems are listed in `rejected` and the "
                                   "rest proceed.",
                    "security": SUBMIT,
                    "parameters": [
                        _query("format", "body format when Content-Type does not say "
                               "(application/octet-stream)",
                               {"type": "string", "enum": ["csv", "json", "parquet"]}),
                        _query("units", "units of plain pressure/loading columns that do not "
                               "name their own (a column such as pressure_kpa carries its unit), "
                               "e.g. pressure:kPa,loading:mmol/g; see docs/formats.md",
                               {"type": "string", "example": "pressure:kPa,loading:mmol/g"}),
                        _query("sample_mass_g", "sample mass in g, for absolute loadings (e.g. "
                               "loading_mmol) where the body gives none",
                               {"type": "number", "exclusiveMinimum": 0}),
                        _query("delimiter", "CSV delimiter; detected from the header line when "
                               "left out", {"type": "string",
                                            "enum": ["comma", "semicolon", "tab", ",", ";"]}),
                        _query("decimal", "CSV decimal mark; a comma only in files not "
                               "comma-delimited; detected when left out",
                               {"type": "string", "enum": ["point", "comma", ".", ","]}),
                        _query("batch_label", "a name for the batch", {"type": "string"}),
                        _query("models", "'all' or comma-separated model ids (see /api/v1/models)",
                               {"type": "string", "default": "all"}),
                        _query("criterion", "model selection criterion",
                               {"type": "string", "enum": ["aicc", "aic", "bic"], "default": "aicc"}),
                        _query("weighting", "least-squares weighting", {"type": "string"}),
                        _query("absolute_sigma", "with weighting=sigma: the sigma is calibrated; "
                               "covariance not rescaled, chi-square reported (docs/results.md)",
                               {"type": "boolean", "default": False}),
                        {"name": "Idempotency-Key", "in": "header", "required": False,
                         "description": "a retried request with the same key returns the same "
                                        "batch instead of creating another",
                         "schema": {"type": "string", "maxLength": 200}},
                    ],
                    "requestBody": {"required": True, "content": {
                        "text/csv": {"schema": {"type": "string"}},
                        "application/json": {"schema": {"type": "object"}},
                        "application/vnd.apache.parquet": {"schema": {"type": "string"}},
                        "application/octet-stream": {"schema": {"type": "string"}},
                    }},
                    "responses": {
                        "202": {"description": "accepted and durably stored",
                                "headers": {"Location": {"schema": {"type": "string"},
                                                         "description": "the status URL"}},
                                "content": {"application/json": {"schema": {
                                    "$ref": "#/components/schemas/Accepted"}}}},
                        "400": _problem("bad parameter"),
                        **AUTH_ERRORS,
                        "413": _problem("body larger than the configured limit"),
                        "415": _problem("unknown body format"),
                        "422": _problem("unreadable body, nothing acceptable (issues listed), or "
                                        "Idempotency-Key reused with a different request"),
                        "503": _problem("busy (too many intakes at once) or a read-only store; "
                                        "Retry-After says when to retry"),
                        "507": _problem("the store is full (below SORBRANK_MIN_FREE_BYTES, or a "
                                        "write ran out of space); nothing of the batch is kept"),
                    },
                },
                "get": {
                    "operationId": "listBatches",
                    "summary": "Batches, newest first, with state and progress",
                    "security": READ,
                    "parameters": [
                        _query("state", "only batches in this state", {"$ref": "#/components/schemas/State"}),
                        _query("limit", "batches per page", {"type": "integer", "minimum": 1,
                                                             "maximum": 1000, "default": 50}),
                        _query("offset", "batches to skip", {"type": "integer", "minimum": 0}),
                    ],
                    "responses": {"200": {"description": "a page of batches", "content": {
                        "application/json": {"schema": {"type": "object", "properties": {
                            "batches": {"type": "array", "items": {"type": "object"}},
                            "total": {"type": "integer"}}}}}},
                        "400": _problem("bad parameter"), **AUTH_ERRORS},
                },
            },
            "/api/v1/batches/{batch_id}": {
                "get": {
                    "operationId": "getBatch",
                    "summary": "State, counts, progress and timings of one batch",
                    "security": READ,
                    "parameters": [_ref("batch_id")],
                    "responses": {"200": {"description": "the batch", "content": {
                        "application/json": {"schema": {"$ref": "#/components/schemas/BatchStatus"}}}},
                        **AUTH_ERRORS, "404": _problem("no such batch")},
                },
            },
            "/api/v1/batches/{batch_id}/results": {
                "get": {
                    "operationId": "getBatchResults",
                    "summary": "Per-isotherm summaries, per-model fits and per-sorbent rows",
                    "description": "JSON holds every table unless `table` is given; the tabular "
                                   "formats hold one table (default summary). CSV text cells "
                                   "that a spreadsheet would evaluate are prefixed with '.",
                    "security": READ,
                    "parameters": [_ref("batch_id"), _ref("format"),
                                   _query("table", "which table", {"type": "string", "enum":
                                                                   ["summary", "fits", "sorbents"]})],
                    "responses": {"200": {"description": "results so far (see X-Batch-State)",
                                          "content": TABULAR},
                                  "400": _problem("bad parameter"), **AUTH_ERRORS,
                                  "404": _problem("no such batch"),
                                  "406": _problem("no acceptable format")},
                },
            },
            "/api/v1/rankings": {
                "get": {
                    "operationId": "getRankings",
                    "summary": "Rank isotherm results across every batch",
                    "description": "By default " + LATEST_WINS_RULE + "; `all=true` returns "
                                   "every result. Batch, sorbent, adsorbate and temperature "
                                   "filters apply before that choice, flag filters after it.",
                    "security": READ,
                    "parameters": RANKING_PARAMS,
                    "responses": {"200": {"description": "a page of ranked rows; JSON as "
                                                         "{rows, total, mixed_conditions, "
                                                         "condition_sets}, headers "
                                                         "X-Total-Count and X-Mixed-Conditions "
                                                         "(true when the ranked rows' sorted "
                                                         "figure was computed at several "
                                                         "pressures or temperatures)",
                                          "content": TABULAR},
                                  "400": _problem("bad parameter (e.g. unknown sort column)"),
                                  **AUTH_ERRORS, "406": _problem("no acceptable format")},
                },
            },
            "/api/v1/sorbents/{sorbent_id}": {
                "get": {
                    "operationId": "getSorbent",
                    "summary": "Inputs, summaries, fits and sorbent metrics of one sorbent",
                    "security": READ,
                    "parameters": [{"name": "sorbent_id", "in": "path", "required": True,
                                    "schema": {"type": "string"}}],
                    "responses": {"200": {"description": "everything known", "content": {
                        "application/json": {"schema": {"type": "object"}}}},
                        **AUTH_ERRORS, "404": _problem("sorbent not in any batch")},
                },
            },
            "/api/v1/models": {
                "get": {
                    "operationId": "listModels",
                    "summary": "The isotherm model catalogue",
                    "security": READ,
                    "responses": {"200": {"description": "models with parameters, units and "
                                                         "bounds (infinite bounds as null)",
                                          "content": {"application/json": {"schema": {
                                              "type": "object"}}}}, **AUTH_ERRORS},
                },
            },
            **PLOT_AND_PAGE_PATHS,
            "/api/v1/openapi.json": {
                "get": {"operationId": "getOpenApi", "summary": "This document", "security": [],
                        "responses": {"200": {"description": "OpenAPI 3.1", "content": {
                            "application/json": {"schema": {"type": "object"}}}}}},
            },
            "/healthz": {
                "get": {"operationId": "healthz", "summary": "The process is alive", "security": [],
                        "responses": {"200": {"description": "alive", "content": {
                            "application/json": {"schema": {"type": "object"}}}}}},
            },
            "/metrics": {
                "get": {"operationId": "metrics", "security": [],
                        "summary": "Prometheus metrics (text exposition format); open like the "
                                   "probes: counts, durations and sizes only",
                        "description": "sorbrank_batches_accepted_total, sorbrank_batches_done_total, "
                                       "sorbrank_batches_failed_total, sorbrank_batches_partial_total, "
                                       "sorbrank_isotherms_fitted_total{model}, "
                                       "sorbrank_chunk_fit_duration_seconds (histogram), "
                                       "sorbrank_queue_depth_chunks, sorbrank_store_size_bytes; "
                                       "derived from the store, so every API process reports the same",
                        "responses": {"200": {"description": "metrics", "content": {
                            "text/plain": {"schema": {"type": "string"}}}}}},
            },
            "/readyz": {
                "get": {"operationId": "readyz", "summary": "Store writable and (distributed "
                                                            "mode) broker reachable",
                        "security": [],
                        "responses": {"200": {"description": "ready", "content": {
                            "application/json": {"schema": {"type": "object"}}}},
                            "503": _problem("not ready; reasons listed")}},
            },
        },
        "components": {
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer",
                                           "description": "scopes: submit, read, admin"}},
            "parameters": {
                "batch_id": {"name": "batch_id", "in": "path", "required": True,
                             "schema": {"type": "string", "pattern": BATCH_ID_PATTERN.pattern}},
                "format": {"name": "format", "in": "query", "required": False,
                           "description": "response format; otherwise the Accept header decides "
                                          "(arrow = Arrow IPC stream)",
                           "schema": {"type": "string", "enum": ["json", "csv", "parquet", "arrow"]}},
            },
            "schemas": {
                "Problem": {"type": "object", "required": ["type", "title", "status"],
                            "properties": {"type": {"type": "string"}, "title": {"type": "string"},
                                           "status": {"type": "integer"},
                                           "detail": {"type": "string"},
                                           "issues": {"type": "array",
                                                      "items": {"$ref": "#/components/schemas/Issue"}}}},
                "Issue": {"type": "object", "properties": {
                    "batch": {"type": "string"}, "isotherm": {"type": ["string", "null"]},
                    "row": {"type": ["integer", "null"]}, "field": {"type": ["string", "null"]},
                    "code": {"type": "string"}, "message": {"type": "string"}}},
                "State": {"type": "string", "enum": ["queued", "running", "done", "failed", "partial"]},
                "Accepted": {"type": "object",
                             "required": ["batch_id", "status_url", "accepted", "rejected"],
                             "properties": {
                                 "batch_id": {"type": "string"}, "status_url": {"type": "string"},
                                 "accepted": {"type": "integer"},
                                 "rejected": {"type": "array",
                                              "items": {"$ref": "#/components/schemas/Issue"}}}},
                "BatchStatus": {"type": "object", "properties": {
                    "batch_id": {"type": "string"},
                    "state": {"$ref": "#/components/schemas/State"},
                    "counts": {"type": "object", "properties": {
                        k: {"type": "integer"} for k in ("accepted", "done", "failed", "rejected")}},
                    "progress": {"type": "number", "minimum": 0, "maximum": 1},
                    "chunks": {"type": "object"},
                    "timings": {"type": "object", "properties": {
                        k: {"type": ["string", "null"], "format": "date-time"}
                        for k in ("accepted_at", "started_at", "finished_at")}},
                    "rejected": {"type": "array", "items": {"$ref": "#/components/schemas/Issue"}},
                    "errors": {"type": "array", "items": {"type": "object"}},
                    "damaged_chunks": {"type": "array", "items": {
                        "type": "object", "properties": {
                            "chunk": {"type": "integer"}, "table": {"type": "string"},
                            "reason": {"type": "string"}, "file": {"type": "string"},
                            "quarantined_at": {"type": "string", "format": "date-time"},
                            "repaired": {"type": "boolean"}}}}}},
            },
        },
    }
