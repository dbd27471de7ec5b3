"""Everything known about one sorbent, across batches."""
from __future__ import annotations

import json

import pyarrow.dataset as ds
from flask import Blueprint, current_app

from ..auth import require
from ..problems import Problem
from .formats import json_rows

bp = Blueprint("sorbents", __name__)


@bp.get("/sorbents/<sorbent_id>")
@require("read")
def get_sorbent(sorbent_id: str):
    store = current_app.extensions["sorbrank"].store
    found = {}
    for key, table in (("isotherms", "inputs"), ("summaries", "summaries"),
                       ("fits", "fits"), ("sorbent_metrics", "sorbents")):
        data = store.dataset(table)
        if data is None or "sorbent_id" not in data.schema.names:
            found[key] = []
            continue
        rows = data.to_table(filter=ds.field("sorbent_id") == sorbent_id)
        found[key] = json_rows(rows.sort_by([("batch_id", "descending")]))  # ids sort by time
    for row in found["isotherms"]:
        row["original"] = json.loads(row.pop("original_json") or "{}")
    if not any(found.values()):
        raise Problem(404, "Not Found", f"no sorbent {sorbent_id!r} in any batch",
                      slug="unknown-sorbent", sorbent_id=sorbent_id)
    return {"sorbent_id": sorbent_id,
            "batches": sorted({r["batch_id"] for r in found["isotherms"]}, reverse=True),
            **found}
