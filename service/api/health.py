"""Liveness and readiness probes; no token needed."""
from __future__ import annotations

from flask import Blueprint, current_app

from ..problems import Problem

bp = Blueprint("health", __name__)


@bp.get("/healthz")
def healthz():
    return {"status": "alive"}


@bp.get("/readyz")
def readyz():
    runtime = current_app.extensions["sorbrank"]
    reasons = runtime.not_ready()
    if reasons:
        raise Problem(503, "Service Unavailable", "; ".join(reasons), slug="not-ready",
                      reasons=reasons, mode=runtime.settings.mode)
    return {"status": "ready", "mode": runtime.settings.mode}
