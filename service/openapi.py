"""The OpenAPI 3.1 description of the HTTP API, kept beside the code it describes.

A test checks that every registered Flask route appears here and that the
document validates, so the two cannot drift apart silently.
"""
from __future__ import annotations

from sorbrank.worker.store import BATCH_ID_PATTERN, LATEST_WINS_RULE

# one declaration of every endpoint's query parameters: what the app checks
from .api.params import query_parameters

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


AUTH_ERRORS = {"401": _problem("missing or invalid bearer token"),
               "403": _problem("the token lacks the needed scope")}
READ = [{"bearer": ["read"]}]
SUBMIT = [{"bearer": ["submit"]}]

RANKING_PARAMS = query_parameters("rankings.get_rankings")


IMAGES = {"image/svg+xml": {"schema": {"type": "string"}},
          "image/png": {"schema": {"type": "string", "contentMediaType": "image/png"}}}
HTML = {"text/html": {"schema": {"type": "string"}}}
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
                *query_parameters("plots.isotherm_plot"),
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
                *query_parameters("plots.qst_plot"),
            ],
            "responses": {"200": {"description": "the plot", "content": IMAGES},
                          "400": _problem("bad parameter"), **AUTH_ERRORS,
                          "404": _problem("no isosteric heat stored for this sorbent")},
        },
    },
    "/": {
        "get": {"operationId": "pageRankings", "summary": "HTML page: rankings and batches",
                "security": READ,
                "parameters": query_parameters("web.overview"),
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


UNKNOWN_PARAMETER = ("a query parameter this operation does not take (problem "
                     "unknown-parameter: `unknown` names each, `accepted` lists the rest), or a "
                     "parameter read once given twice (repeated-parameter)")
PAGING_HEADERS = {
    "X-Total-Count": {"schema": {"type": "integer"}, "description": "rows that match"},
    "X-Returned-Count": {"schema": {"type": "integer"}, "description": "rows in this answer"},
    "Link": {"schema": {"type": "string"}, "description": "RFC 8288 links (rel first, prev, "
             "next, last; root-relative URLs keeping the other parameters) whenever this answer "
             "holds fewer rows than match"},
}


def document() -> dict:
    """The document; every operation answers 400 for a query parameter it does
    not take (service/api/params.py), so each lists a 400."""
    doc = _document()
    for path, operations in doc["paths"].items():
        page = not path.startswith("/api/") and path not in ("/healthz", "/readyz", "/metrics")
        for operation in operations.values():
            responses = operation["responses"]
            if "400" not in responses:
                responses["400"] = ({"description": UNKNOWN_PARAMETER + " (HTML page)",
                                     "content": HTML} if page else _problem(UNKNOWN_PARAMETER))
            elif "unknown-parameter" not in responses["400"]["description"]:
                responses["400"] = {**responses["400"], "description":
                                    responses["400"]["description"] + "; or " + UNKNOWN_PARAMETER}
    return doc


def _document() -> dict:
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
                        *query_parameters("batches.submit_batch"),
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
                        *query_parameters("batches.list_batches"),
                    ],
                    "responses": {"200": {"description": "a page of batches, newest first; "
                                                         "Link rel=next while more remain",
                                          "headers": PAGING_HEADERS, "content": {
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
                    "parameters": [_ref("batch_id"), *query_parameters("batches.get_results")],
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
                    "responses": {"200": {"description": "JSON: a page of ranked rows "
                                                         "(default 100) as {rows, total, "
                                                         "returned, links, mixed_conditions, "
                                                         "condition_sets}; CSV, Parquet and "
                                                         "Arrow: every matching row unless "
                                                         "limit/offset are given, streamed. "
                                                         "X-Mixed-Conditions is true when the "
                                                         "ranked rows' sorted figure was "
                                                         "computed at several pressures or "
                                                         "temperatures",
                                          "headers": {**PAGING_HEADERS, "X-Mixed-Conditions": {
                                              "schema": {"type": "string",
                                                         "enum": ["true", "false"]}}},
                                          "content": TABULAR},
                                  "400": _problem("bad parameter (e.g. unknown sort column), "
                                                  "an adsorbate intake does not know "
                                                  "(unknown-adsorbate, with suggestions), or "
                                                  + UNKNOWN_PARAMETER),
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
