"""Errors as problem details (RFC 9457, media type application/problem+json).

A leaf of the service's imports: the HTML error page of the pages
(``service/web``) is handed in by the app factory, never imported here.
"""
from __future__ import annotations

import logging
from typing import Callable

from flask import Flask, Response, json, request
from werkzeug.exceptions import HTTPException

PROBLEM_JSON = "application/problem+json"
# paths of the HTML pages (service/web): an unmatched URL there (a sorbent id
# the router cannot take, a wrong method) answers with an HTML page, as documented
HTML_PATH_PREFIXES = ("/sorbents/", "/assets/")


def _is_page_path(path: str) -> bool:
    return path == "/" or path.startswith(HTML_PATH_PREFIXES)
log = logging.getLogger(__name__)


class Problem(Exception):
    """Raise anywhere in a request to answer with a problem document."""

    def __init__(self, status: int, title: str, detail: str | None = None, *,
                 slug: str | None = None, headers: dict | None = None, **extra):
        super().__init__(detail or title)
        self.status, self.title, self.detail = status, title, detail
        self.slug, self.headers, self.extra = slug, headers or {}, extra

    def response(self) -> Response:
        body = {
            # "about:blank" means: the title is just the HTTP status phrase
            "type": f"urn:sorbrank:problem:{self.slug}" if self.slug else "about:blank",
            "title": self.title,
            "status": self.status,
        }
        if self.detail:
            body["detail"] = self.detail
        body.update(self.extra)
        resp = Response(json.dumps(body), status=self.status, mimetype=PROBLEM_JSON)
        resp.headers.update(self.headers)
        return resp


# seconds a client is asked to wait before retrying against a read-only store
STORE_RETRY_AFTER_S = 30


def insufficient_storage(detail: str, **extra) -> Problem:
    """507: the store has no room for this request; nothing of it was kept."""
    return Problem(507, "Insufficient Storage", detail, slug="insufficient-storage", **extra)


def storage_problem(exc: BaseException) -> Problem | None:
    """The problem a failed store write answers with: 507 for a full disk or
    quota, 503 for a read-only store; None for any other error."""
    from sorbrank.worker import fs

    if fs.out_of_space(exc):
        return insufficient_storage("the store is full: nothing of this request was kept; "
                                    "retry once space is freed")
    if fs.read_only(exc):
        return Problem(503, "Service Unavailable", "the store cannot be written (read-only or "
                       "not permitted): nothing of this request was kept", slug="store-read-only",
                       headers={"Retry-After": str(STORE_RETRY_AFTER_S)})
    return None


# (status, title, detail, headers) -> the HTML error response of the pages
PageError = Callable[[int, str, str | None, dict], object]


def register(app: Flask, page_error: PageError | None = None) -> None:
    """Answer errors as problem documents; on page paths, when ``page_error``
    is given, an unmatched URL or a wrong method answers with its HTML page."""
    @app.errorhandler(Problem)
    def _problem(exc: Problem):
        return exc.response()

    @app.errorhandler(HTTPException)
    def _http(exc: HTTPException):
        headers = {k: v for k, v in exc.get_headers() if k.lower() != "content-type"}
        if page_error is not None and _is_page_path(request.path):
            return page_error(exc.code or 500, exc.name, exc.description, headers)
        return Problem(exc.code or 500, exc.name, exc.description, headers=headers).response()

    @app.errorhandler(Exception)
    def _unexpected(exc: Exception):
        storage = storage_problem(exc)
        if storage is not None:  # the store's state, not a defect: the log says which
            log.warning("store write failed: %s", exc)
            return storage.response()
        # never leak a traceback to the client; the log has it
        log.exception("unhandled error")
        return Problem(500, "Internal Server Error",
                       "the server failed; the error is logged. Accepted batches are safe on disk.",
                       ).response()
