"""The model catalogue."""
from __future__ import annotations

from flask import Blueprint

from sorbrank.worker.models import catalogue_description
from sorbrank.worker.store import nan_to_none

from ..auth import require

bp = Blueprint("models", __name__)


@bp.get("/models")
@require("read")
def list_models():
    # bounds may be infinite: JSON has no inf, so they are reported as null
    return {"models": nan_to_none(catalogue_description())}
