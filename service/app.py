"""The Flask application factory.

``create_app()`` reads settings from the environment; the serve command passes
its own settings and the enqueue function of the mode it runs in (Celery in
distributed mode, the local process pool in embedded mode).
"""
from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Callable

from flask import Flask

from worker.store import Store

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

    def not_ready(self) -> list[str]:
        """Reasons the service cannot take work right now (empty = ready)."""
        reasons = []
        if not self.store.writable():
            reasons.append(f"store {self.store.root} is not writable")
        if self.settings.broker_url:
            import redis  # only distributed mode needs it

            try:
                redis.Redis.from_url(self.settings.broker_url, socket_timeout=2,
                                     socket_connect_timeout=2).ping()
            except redis.RedisError as exc:
                reasons.append(f"broker unreachable: {exc}")
        return reasons


def _celery_enqueue(batch_id: str, chunk_index: int) -> None:
    from worker.tasks import enqueue

    enqueue(batch_id, chunk_index)


def create_app(settings: Settings | None = None,
               enqueue: Callable[[str, int], None] | None = None) -> Flask:
    settings = settings or load_settings()
    if enqueue is None:
        if settings.broker_url:
            enqueue = _celery_enqueue
        else:
            from worker.embedded import EmbeddedExecutor

            executor = EmbeddedExecutor(settings.data_dir, settings.embedded_workers)
            executor.resume()
            enqueue = executor.enqueue

    app = Flask(__name__)
    # Werkzeug refuses longer bodies with 413 before reading them
    app.config["MAX_CONTENT_LENGTH"] = settings.max_upload_bytes
    app.json.sort_keys = False
    app.extensions["sorbrank"] = Runtime(settings, Store(settings.data_dir),
                                         Authenticator(list(settings.tokens)), enqueue)
    problems.register(app)

    from .api import batches, health, materials, models, rankings

    app.register_blueprint(health.bp)
    for module in (batches, rankings, materials, models):
        app.register_blueprint(module.bp, url_prefix=API_PREFIX)
    from .api import plots
    from .web import pages

    app.register_blueprint(plots.bp, url_prefix=API_PREFIX)
    app.register_blueprint(pages.bp)

    from .openapi import document

    @app.get(f"{API_PREFIX}/openapi.json")
    def openapi_document():
        return document()

    return app
