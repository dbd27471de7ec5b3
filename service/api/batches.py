"""Batches: submit, list, status, results."""
from __future__ import annotations

import hashlib
import logging
import threading

import pyarrow as pa
from flask import Blueprint, current_app, g, request, url_for

from sorbrank.worker import fs, jobs
from sorbrank.worker.intake import Limits, read_batch
from sorbrank.worker.isotherm import IntakeError
from sorbrank.worker.pipeline import FitOptions
from sorbrank.worker.units import parse_units_declaration
from sorbrank.worker.store import iso_utc, is_batch_id, new_batch_id, utc_now

from ..auth import require
from ..problems import Problem, insufficient_storage, storage_problem
from .export import page_links, paging_headers
from .formats import choice_arg, int_arg, json_rows, negotiate, table_response

bp = Blueprint("batches", __name__)
log = logging.getLogger(__name__)

CONTENT_FORMATS = {
    "text/csv": "csv",
    "application/csv": "csv",
    "application/json": "json",
    "application/vnd.apache.parquet": "parquet",
    "application/x-parquet": "parquet",
}
# query parameters handed to intake as they are (intake checks them)
INTAKE_PARAMS = ("units", "sample_mass_g", "delimiter", "decimal")
# whole-input intake errors: size -> 413, cannot even be parsed -> 400, else 422
# internal_error means a defect in intake itself: say so honestly with a 500
# (the hostile-input tests then catch it) rather than blame the client
_INTAKE_STATUS = {"input_too_large": 413, "not_utf8": 400, "unparseable": 400,
                  "malformed_row": 400, "too_deeply_nested": 400, "unsupported_source": 400,
                  "internal_error": 500}
OPTION_PARAMS = ("models", "criterion", "weighting")
RESULT_TABLES = {"summary": "summaries", "fits": "fits", "sorbents": "sorbents"}
# Requests with the same Idempotency-Key are serialised by one of these; a
# fixed number keeps memory bounded however many keys arrive.
_KEY_LOCKS = [threading.Lock() for _ in range(64)]


def _runtime():
    return current_app.extensions["sorbrank"]


def _body_format() -> str:
    explicit = request.args.get("format")
    if explicit is not None:
        if explicit not in ("csv", "json", "parquet"):
            raise Problem(400, "Bad Request", f"format={explicit!r}: choose csv, json or parquet",
                          slug="bad-parameter", parameter="format")
        return explicit
    media = (request.mimetype or "").lower()
    if media in CONTENT_FORMATS:
        return CONTENT_FORMATS[media]
    raise Problem(415, "Unsupported Media Type",
                  f"Content-Type {media or '(none)'!r} is not a batch format: send text/csv, "
                  "application/json or application/vnd.apache.parquet (or "
                  "application/octet-stream with ?format=parquet)", slug="unsupported-format")


def _fit_options() -> dict:
    options = {}
    for name in OPTION_PARAMS:
        raw = request.args.get(name)
        if raw is not None:
            options[name] = raw if name != "models" or raw == "all" else \
                [m.strip() for m in raw.split(",") if m.strip()]
    raw = request.args.get("absolute_sigma")
    if raw is not None:  # any text but true/false stays text, which FitOptions refuses
        options["absolute_sigma"] = {"true": True, "false": False}.get(raw, raw)
    try:
        FitOptions(**options)
    except (TypeError, ValueError, KeyError) as exc:
        raise Problem(400, "Bad Request", f"fit options: {exc}", slug="bad-parameter",
                      parameter=",".join(options)) from None
    return options


def _intake_params() -> dict:
    """The intake query parameters, the units declaration checked here so that a bad
    one is a 400 naming the parameter."""
    # retired names (pressure_unit, ...) are refused by params.RETIRED before the view
    params = {k: request.args[k] for k in INTAKE_PARAMS if k in request.args}
    if "units" in params:
        try:
            parse_units_declaration(params["units"])
        except ValueError as exc:
            raise Problem(400, "Bad Request", f"units={params['units']!r}: {exc}",
                          slug="bad-parameter", parameter="units") from None
    return params


def _issues_problem(status: int, title: str, detail: str, issues) -> Problem:
    return Problem(status, title, detail, slug="batch-rejected",
                   issues=[i.as_dict() for i in issues])


def _accepted_response(manifest: dict):
    body = {
        "batch_id": manifest["batch_id"],
        "status_url": url_for("batches.get_batch", batch_id=manifest["batch_id"]),
        "accepted": manifest["accepted"],
        "rejected": manifest["rejected"],
    }
    return body, 202, {"Location": body["status_url"]}


def _check_size() -> None:
    limit = current_app.config["MAX_CONTENT_LENGTH"]
    if request.content_length is not None and request.content_length > limit:
        raise Problem(413, "Content Too Large", f"the body is {request.content_length} bytes; "
                      f"this service takes at most {limit} bytes per batch (split the batch)",
                      slug="too-large", max_bytes=limit)


def _check_json_size(fmt: str, size: int | None) -> None:
    """413 for a JSON body over SORBRANK_MAX_JSON_BYTES: parsing JSON costs about
    44 times the body in memory, Parquet a small fraction of that."""
    limit = _runtime().settings.max_json_bytes
    if fmt == "json" and size is not None and size > limit:
        raise Problem(413, "Content Too Large", f"the JSON body is {size} bytes; this service "
                      f"parses at most {limit} bytes of JSON per batch: send the batch as "
                      "Parquet or CSV, or split it", slug="too-large", max_bytes=limit)


# seconds a client is asked to wait when every intake slot is taken
BUSY_RETRY_AFTER_S = 2


def _intake_slot(runtime) -> None:
    """Take one of the intake slots (released by the caller), or answer 503."""
    if not runtime.intake_slots.acquire(blocking=False):
        raise Problem(503, "Service Unavailable", "the service is reading as many batches as it "
                      "takes at once; retry after the time in Retry-After", slug="busy",
                      headers={"Retry-After": str(BUSY_RETRY_AFTER_S)})


def _check_unsized_body_end(read: int) -> None:
    """413 for a body of unannounced length (chunked) that goes on past the limit.

    Werkzeug refuses a Content-Length over MAX_CONTENT_LENGTH before reading,
    but a chunked body it just stops reading at the limit, without an error:
    what ``get_data`` returns is then the first ``limit`` bytes, not the body.
    """
    limit = current_app.config["MAX_CONTENT_LENGTH"]
    if request.content_length is not None or read < limit:
        return
    try:
        more = request.environ["wsgi.input"].read(1)
    except (OSError, ValueError):  # broken chunk framing past the limit: still too large
        more = b"?"
    if more:
        raise Problem(413, "Content Too Large", f"the body goes on past {limit} bytes; this "
                      f"service takes at most {limit} bytes per batch (split the batch)",
                      slug="too-large", max_bytes=limit)


@bp.post("/batches")
@require("submit")
def submit_batch():
    runtime = _runtime()
    _check_size()
    fmt = _body_format()
    options = _fit_options()
    defaults = _intake_params()
    label = request.args.get("batch_label")
    key = request.headers.get("Idempotency-Key")
    if key is not None and not (0 < len(key) <= 200 and key.isprintable()):
        raise Problem(400, "Bad Request", "Idempotency-Key must be 1 to 200 printable characters",
                      slug="bad-idempotency-key")
    _check_json_size(fmt, request.content_length)
    # the body and everything parsed from it live only while a slot is held,
    # so memory is bounded by the slots times the largest body
    _intake_slot(runtime)
    try:
        return _submit(runtime, fmt, options, defaults, label, key)
    finally:
        runtime.intake_slots.release()


def _submit(runtime, fmt: str, options: dict, defaults: dict, label, key):
    body = request.get_data(cache=False)
    _check_unsized_body_end(len(body))
    _check_json_size(fmt, len(body))
    if key is None:
        return _store_and_queue(runtime, _parse(runtime, body, fmt, label, defaults), body, fmt,
                                options, new_batch_id())

    # The key is scoped to the client, so two clients never see each other's batch
    key_hash = hashlib.sha256(f"{g.client}\0{key}".encode()).hexdigest()
    fingerprint = hashlib.sha256(
        body + repr((fmt, label, sorted(defaults.items()), sorted(options.items()))).encode()
    ).hexdigest()
    with _KEY_LOCKS[int(key_hash[:8], 16) % len(_KEY_LOCKS)]:
        record = runtime.store.read_idempotency(key_hash)
        if record is None:
            batch = _parse(runtime, body, fmt, label, defaults)
            # Bind the key to a batch id before writing anything else: a retry
            # after a crash, or a duplicate racing in another server process,
            # then lands on this same id instead of creating a second batch.
            record = runtime.store.claim_idempotency(key_hash, {
                "batch_id": new_batch_id(), "fingerprint": fingerprint,
                "created_at": iso_utc(utc_now())})
        else:
            batch = None
        if record["fingerprint"] != fingerprint:
            raise Problem(422, "Unprocessable Content", "this Idempotency-Key was used "
                          "with a different request; use a new key for a new batch",
                          slug="idempotency-key-reused", batch_id=record["batch_id"])
        manifest = runtime.store.read_manifest(record["batch_id"])
        if manifest is not None:
            return _accepted_response(manifest)
        # the first request died before its manifest (or, in another server process,
        # is still writing it): do its work under its id; the files are the same
        batch = batch or _parse(runtime, body, fmt, label, defaults)
        return _store_and_queue(runtime, batch, body, fmt, options, record["batch_id"])


def _parse(runtime, body: bytes, fmt: str, label, defaults):
    """The batch read from ``body``; a problem document when none of it is usable."""
    limits = Limits(**dict(runtime.settings.intake_limits))
    try:
        batch = read_batch(body, fmt, batch_label=label, limits=limits, **defaults)
    except IntakeError as exc:
        status = max((_INTAKE_STATUS.get(i.code, 422) for i in exc.issues), default=422)
        title = {400: "Bad Request", 413: "Content Too Large",
                 500: "Internal Server Error"}.get(status, "Unprocessable Content")
        raise _issues_problem(status, title, f"the {fmt} body could not be read as a batch: {exc}",
                              exc.issues)
    if not batch.isotherms:
        raise _issues_problem(422, "Unprocessable Content",
                              f"batch {batch.label!r}: no isotherm is acceptable "
                              f"({len(batch.rejected)} issue(s) listed)", batch.rejected)
    return batch


def check_free_space(runtime) -> None:
    """507 while the store has less free space than SORBRANK_MIN_FREE_BYTES: the
    room left is for the results of batches already accepted."""
    store, minimum = runtime.store, runtime.settings.min_free_bytes
    free = fs.free_bytes(store.fs, store.base) if minimum else None
    if free is not None and free < minimum:
        raise insufficient_storage(f"the store has {free} bytes free, below the "
                                   f"{minimum} bytes (SORBRANK_MIN_FREE_BYTES) kept for batches "
                                   "already accepted; retry once space is freed",
                                   free_bytes=free, min_free_bytes=minimum)


def _store_and_queue(runtime, batch, body: bytes, fmt: str, options: dict, batch_id: str):
    source = {"format": fmt, "bytes": len(body), "sha256": hashlib.sha256(body).hexdigest(),
              "client": g.client}
    check_free_space(runtime)
    try:
        manifest = jobs.accept_batch(runtime.store, batch, options=options,
                                     chunk_size=runtime.settings.chunk_size, batch_id=batch_id,
                                     source=source)
    except Exception as exc:
        # no manifest, no batch: its input files would only be listed as sorbents
        try:
            runtime.store.remove_unaccepted(batch_id)
        except OSError:
            log.exception("batch %s: could not remove the input files of a failed acceptance",
                          batch_id)
        problem = storage_problem(exc)
        if problem is None:
            raise
        log.warning("batch %s refused: store write failed: %s", batch_id, exc)
        raise problem from None
    for chunk in manifest["chunks"]:
        try:
            runtime.enqueue(manifest["batch_id"], chunk["index"])
        except Exception:  # logged below: the batch is on disk and reconcile will queue it
            log.exception("batch %s accepted but chunk %s could not be queued; it will be "
                          "queued when a worker starts", manifest["batch_id"], chunk["index"])
    return _accepted_response(manifest)


def _status_or_404(batch_id: str) -> dict:
    status = jobs.batch_status(_runtime().store, batch_id) if is_batch_id(batch_id) else None
    if status is None:
        raise Problem(404, "Not Found", f"no batch {batch_id!r}", slug="unknown-batch",
                      batch_id=batch_id)
    return status


@bp.get("/batches")
@require("read")
def list_batches():
    store = _runtime().store
    limit = int_arg("limit", 50, 1, 1000)
    offset = int_arg("offset", 0, 0, 10**9)
    wanted = request.args.get("state")
    ids = store.batch_ids()
    if wanted is None:
        page = [jobs.batch_status(store, b) for b in ids[offset:offset + limit]]
        total = len(ids)
    else:
        matching = [s for s in (jobs.batch_status(store, b) for b in ids) if s["state"] == wanted]
        page, total = matching[offset:offset + limit], len(matching)
    for status in page:  # the list stays small; details are one GET away
        status["rejected_issues"] = len(status.pop("rejected"))
        status["status_url"] = url_for("batches.get_batch", batch_id=status["batch_id"])
    # a page: the rest is one Link away, never cut silently
    return ({"batches": page, "total": total, "returned": len(page), "limit": limit,
             "offset": offset, "links": page_links(total, offset, limit)},
            200, paging_headers(total, offset, limit))


def _submitted_by(batch_id: str) -> str | None:
    """The client (token name) that submitted the batch, from its manifest."""
    manifest = _runtime().store.read_manifest(batch_id) if is_batch_id(batch_id) else None
    return ((manifest or {}).get("source") or {}).get("client")


@bp.get("/batches/<batch_id>")
@require("read", owner=_submitted_by)
def get_batch(batch_id: str):
    return _status_or_404(batch_id)


@bp.get("/batches/<batch_id>/results")
@require("read", owner=_submitted_by)
def get_results(batch_id: str):
    status = _status_or_404(batch_id)
    fmt = negotiate()
    store = _runtime().store
    headers = {"X-Batch-State": status["state"]}
    if fmt == "json":
        names = ([choice_arg("table", "summary", tuple(RESULT_TABLES))]
                 if "table" in request.args else list(RESULT_TABLES))
        body = {"batch_id": batch_id, "state": status["state"], "counts": status["counts"]}
        for name in names:
            body[name] = json_rows(_result_table(store, name, batch_id))
        body["rejected"], body["errors"] = status["rejected"], status["errors"]
        return body, 200, headers
    name = choice_arg("table", "summary", tuple(RESULT_TABLES))
    return table_response(_result_table(store, name, batch_id), fmt, f"{batch_id}-{name}", headers)


def _result_table(store, name: str, batch_id: str) -> pa.Table:
    table = store.batch_table(RESULT_TABLES[name], batch_id)
    if "isotherm_id" in table.column_names:
        table = table.sort_by([("isotherm_id", "ascending")] + (
            [("model", "ascending")] if "model" in table.column_names else []))
    return table
