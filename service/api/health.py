"""Liveness and readiness probes; no token needed."""
from __future__ import annotations

from flask import Blueprint, current_app

from sorbrank.worker import fs

from ..problems import Problem

bp = Blueprint("health", __name__)


@bp.get("/healthz")
def healthz():
    return {"status": "alive"}


@bp.get("/readyz")
def readyz():
    runtime = current_app.extensions["sorbrank"]
    reasons = runtime.not_ready()
    minimum = runtime.settings.min_free_bytes
    free = fs.free_bytes(runtime.store.fs, runtime.store.base) if minimum else None
    if free is not None and free < minimum:
        reasons.append(f"the store has {free} bytes free, below SORBRANK_MIN_FREE_BYTES="
                       f"{minimum}: new batches are refused")
    if reasons:
        raise Problem(503, "Service Unavailable", "; ".join(reasons), slug="not-ready",
                      reasons=reasons, mode=runtime.settings.mode)
    return {"status": "ready", "mode": runtime.settings.mode}
