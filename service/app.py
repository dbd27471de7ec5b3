"""The Flask application factory.

``create_app()`` reads settings from the environment; the serve command passes
its own settings and the enqueue function of the mode it runs in (Celery in
distributed mode, the local process pool in embedded mode).
"""
from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass, field
from typing import Callable

from flask import Flask, Response, g, request

from sorbrank.worker.store import Store

from . import problems
from .auth import Authenticator
from .config import Settings, load_settings

log = logging.getLogger(__name__)
API_PREFIX = "/api/v1"


@dataclass
class Runtime:
    """What the views need, kept on ``app.extensions["sorbrank"]``."""

    settings: Settings
    store: Store
    auth: Authenticator
    enqueue: Callable[[str, int], None]
    # one slot per intake allowed to parse at once (SORBRANK_MAX_CONCURRENT_INTAKES)
    intake_slots: threading.BoundedSemaphore = field(init=False)

    def __post_init__(self):
        self.intake_slots = threading.BoundedSemaphore(self.settings.max_concurrent_intakes)

    def not_ready(self) -> list[str]:
        """Reasons the service cannot take work right now (empty = ready)."""
        reasons = []
        if not self.store.writable():
            # /readyz is unauthenticated: the path goes to the log, not to the caller
            log.warning("readiness: store %s is not writable", self.store.root)
            reasons.append("the store is not writable")
        if self.settings.broker_url:
            import redis  # only distributed mode needs it

            try:
                redis.Redis.from_url(self.settings.broker_url, socket_timeout=2,
                                     socket_connect_timeout=2).ping()
            except redis.RedisError as exc:
                reasons.append(f"broker unreachable: {exc}")
        return reasons


def _celery_enqueue(batch_id: str, chunk_index: int) -> None:
    from sorbrank.worker.tasks import enqueue

    enqueue(batch_id, chunk_index)


def create_app(settings: Settings | None = None,
               enqueue: Callable[[str, int], None] | None = None,
               queue_depth: Callable[[], int | None] | None = None) -> Flask:
    """``queue_depth`` counts waiting chunk jobs for /metrics; distributed mode
    reads the Celery queue in Redis when it is not given."""
    settings = settings or load_settings()
    if enqueue is None:
        if settings.broker_url:
            enqueue = _celery_enqueue
        else:
            from sorbrank.worker.embedded import EmbeddedExecutor

            executor = EmbeddedExecutor(settings.data_dir, settings.embedded_workers)
            executor.resume()
            enqueue, queue_depth = executor.enqueue, executor.pending_chunks
    if queue_depth is None and settings.broker_url:
        from .metrics import broker_queue_depth

        queue_depth = broker_queue_depth(settings.broker_url)

    app = Flask(__name__)
    # Werkzeug refuses longer bodies with 413 before reading them
    app.config["MAX_CONTENT_LENGTH"] = settings.max_upload_bytes
    app.json.sort_keys = False
    app.extensions["sorbrank"] = Runtime(settings, Store(settings.data_dir),
                                         Authenticator(list(settings.tokens)), enqueue)
    from .api import batches, health, sorbents, models, rankings

    app.register_blueprint(health.bp)
    for module in (batches, rankings, sorbents, models):
        app.register_blueprint(module.bp, url_prefix=API_PREFIX)
    from .api import plots
    from .web import pages

    # the app hands the pages' HTML error to problems, which imports no page
    problems.register(app, page_error=pages.error_page)
    app.register_blueprint(plots.bp, url_prefix=API_PREFIX)
    app.register_blueprint(pages.bp)

    from .openapi import document

    @app.get(f"{API_PREFIX}/openapi.json")
    def openapi_document():
        return document()

    from . import metrics

    registry = metrics.make_registry(app.extensions["sorbrank"].store, queue_depth)

    @app.get("/metrics")
    def prometheus_metrics():
        # open like /healthz: counts and durations only, no ids, no data
        return Response(metrics.exposition(registry),
                        headers={"Content-Type": metrics.CONTENT_TYPE})

    _log_requests(app)
    from .api import params

    # every endpoint's query parameters are declared there; others answer 400
    params.register(app)

    @app.after_request
    def no_sniffing(response):
        # a browser must never run a JSON or SVG answer as something else
        response.headers.setdefault("X-Content-Type-Options", "nosniff")
        return response
    return app


request_log = logging.getLogger("sorbrank.http")
QUIET_PATHS = ("/healthz", "/readyz", "/metrics")


def _log_requests(app: Flask) -> None:
    """One JSON line per request: method, path, status, duration, batch id.

    Headers are never logged (they carry the bearer tokens), nor query strings.
    """
    @app.before_request
    def start_clock():
        g.request_started_s = time.perf_counter()

    @app.after_request
    def log_request(response):
        fields = {"method": request.method, "path": request.path,
                  "status": response.status_code, "client": g.get("client")}
        if "request_started_s" in g:
            fields["duration_s"] = round(time.perf_counter() - g.request_started_s, 4)
        batch_id = (request.view_args or {}).get("batch_id")
        if response.status_code == 202 and response.is_json:  # an accepted batch
            body = response.get_json(silent=True) or {}
            batch_id, fields["isotherm_count"] = body.get("batch_id"), body.get("accepted")
        fields["batch_id"] = batch_id
        # probes and scrapes arrive every few seconds: DEBUG unless they fail
        quiet = request.path in QUIET_PATHS and response.status_code < 400
        request_log.log(logging.DEBUG if quiet else logging.INFO, "%s %s %s", request.method,
                        request.path, response.status_code, extra=fields)
        return response
