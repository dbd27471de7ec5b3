"""Everything known about one sorbent, across batches."""
from __future__ import annotations

import json

from flask import Blueprint, current_app

from sorbrank.worker.store.readmodel import sorbent_tables

from ..auth import require
from ..problems import Problem
from .formats import json_rows

bp = Blueprint("sorbents", __name__)


@bp.get("/sorbents/<sorbent_id>")
@require("read")
def get_sorbent(sorbent_id: str):
    store = current_app.extensions["sorbrank"].store
    found = {key: [] if rows is None else json_rows(rows)
             for key, rows in sorbent_tables(store, sorbent_id).items()}
    for row in found["isotherms"]:
        row["original"] = json.loads(row.pop("original_json") or "{}")
    if not any(found.values()):
        raise Problem(404, "Not Found", f"no sorbent {sorbent_id!r} in any batch",
                      slug="unknown-sorbent", sorbent_id=sorbent_id)
    return {"sorbent_id": sorbent_id,
            "batches": sorted({r["batch_id"] for r in found["isotherms"]}, reverse=True),
            **found}
