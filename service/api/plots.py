"""Plots of stored results: one isotherm's fit, Langmuir or BET view, and a
sorbent's isosteric heat.

Nothing is refitted here. The points are the normalised inputs the store kept
at acceptance; the curves come from the stored fits and summary of the same
batch, so the picture always shows what the rankings were built from.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pyarrow.compute as pc
import pyarrow.dataset as ds
from flask import Blueprint, Response, current_app, request

from sorbrank.worker.models import CATALOGUE
from sorbrank.worker.store import Store, is_batch_id, nan_to_none

from ..auth import require
from ..problems import Problem
from .formats import bool_arg, choice_arg

bp = Blueprint("plots", __name__)

KINDS = ("isotherm", "langmuir-linear", "bet")
IMAGE_TYPES = {"svg": "image/svg+xml", "png": "image/png"}
FIT_FIELDS = ("model", "converged", "reason", "selected", "excluded_reason", "n_params",
              "rmse", "r2", "aicc", "akaike_weight")


@dataclass
class StoredIsotherm:
    """One isotherm of one batch as the store holds it."""

    batch_id: str
    inputs: dict                      # a row of the inputs table
    summary: dict | None = None       # its summaries row, once fitted
    fits: list[dict] = field(default_factory=list)  # one dict per model, see fit_entry

    @property
    def pressure_pa(self) -> list[float]:
        return self.inputs["pressure_pa"] or []

    @property
    def loading_mol_per_kg(self) -> list[float]:
        return self.inputs["loading_mol_per_kg"] or []

    @property
    def saturation_pressure_pa(self) -> float | None:
        p0_pa = self.inputs.get("saturation_pressure_pa")
        return p0_pa if p0_pa is not None and math.isfinite(p0_pa) and p0_pa > 0 else None

    def record(self) -> dict:
        """The record shape sorbrank.service.plots draws from (as ``sorbrank fit`` emits)."""
        summary = self.summary or {}
        return {
            "isotherm_id": self.inputs["isotherm_id"],
            "sorbent_id": self.inputs["sorbent_id"],
            "adsorbate": self.inputs["adsorbate"],
            "temperature_k": self.inputs["temperature_k"],
            "saturation_pressure_pa": self.saturation_pressure_pa,
            "best_model": summary.get("best_model"),
            "ambiguous": bool(summary.get("ambiguous")),
            "fits": self.fits,
            "linearized_langmuir": {"q_sat": summary.get("linearized_q_sat_mol_per_kg"),
                                    "affinity": summary.get("linearized_affinity_per_pa")},
            "summary": summary,
        }


def fit_entry(row: dict) -> dict:
    """A fits-table row as a record fit: parameters gathered under ``params``."""
    model = CATALOGUE.get(row.get("model"))
    names = model.param_names() if model is not None else []
    entry = {name: row.get(name) for name in FIT_FIELDS}
    entry["params"] = {name: row.get(f"param_{name}") for name in names}
    entry["stderr"] = {name: row.get(f"stderr_{name}") for name in names}
    return entry


def _rows(store: Store, table: str, where: ds.Expression) -> list[dict]:
    return nan_to_none(store.query(table, where).to_pylist())


def load_isotherm(store: Store, isotherm_id: str, batch_id: str | None = None
                  ) -> StoredIsotherm | None:
    """The isotherm in ``batch_id``, or in the newest batch holding it; None if absent."""
    where = ds.field("isotherm_id") == isotherm_id
    if batch_id is not None:
        where = where & (ds.field("batch_id") == batch_id)
    inputs = _rows(store, "inputs", where)
    if not inputs:
        return None
    newest = max(inputs, key=lambda r: r["batch_id"])  # batch ids sort by acceptance time
    where = (ds.field("isotherm_id") == isotherm_id) & (ds.field("batch_id") == newest["batch_id"])
    summaries = _rows(store, "summaries", where)
    fits = [fit_entry(r) for r in _rows(store, "fits", where)]
    return StoredIsotherm(newest["batch_id"], newest, summaries[0] if summaries else None, fits)


def qst_rows(store: Store, sorbent_id: str, adsorbate: str | None = None) -> list[dict]:
    """Newest isosteric-heat row per adsorbate of a sorbent, sorted by adsorbate."""
    data = store.query("sorbents", ds.field("sorbent_id") == sorbent_id)
    if "kind" not in data.column_names or not data.num_rows:
        return []
    data = data.filter(pc.equal(data["kind"], "isosteric_heat"))
    newest: dict[str, dict] = {}
    for row in nan_to_none(data.to_pylist()):
        if adsorbate is not None and row.get("adsorbate") != adsorbate:
            continue
        held = newest.get(row["adsorbate"])
        if held is None or row["batch_id"] > held["batch_id"]:
            newest[row["adsorbate"]] = row
    return [newest[k] for k in sorted(newest)]


def _image(body: bytes, fmt: str) -> Response:
    resp = Response(body, mimetype=IMAGE_TYPES[fmt])
    # results of a running batch may still arrive: let clients revalidate
    resp.headers["Cache-Control"] = "no-cache"
    return resp


def _not_plottable(detail: str) -> Problem:
    return Problem(422, "Unprocessable Content", detail, slug="not-plottable")


@bp.get("/isotherms/<path:isotherm_id>/plot")
@require("read")
def isotherm_plot(isotherm_id: str):
    kind = choice_arg("kind", "isotherm", KINDS)
    fmt = choice_arg("format", "svg", tuple(IMAGE_TYPES))
    log_pressure = bool_arg("log_pressure")
    batch_id = request.args.get("batch_id") or None
    if batch_id is not None and not is_batch_id(batch_id):
        raise Problem(400, "Bad Request", f"batch_id={batch_id!r} is not a batch id",
                      slug="bad-parameter", parameter="batch_id")

    stored = load_isotherm(current_app.extensions["sorbrank"].store, isotherm_id, batch_id)
    if stored is None:
        where = f" in batch {batch_id}" if batch_id else " in any batch"
        raise Problem(404, "Not Found", f"no isotherm {isotherm_id!r}{where}",
                      slug="unknown-isotherm", isotherm_id=isotherm_id)

    from sorbrank.service import plots  # matplotlib loads on the first plot, not at start

    record = stored.record()
    try:
        if kind == "isotherm":
            body = plots.isotherm_plot(stored.pressure_pa, stored.loading_mol_per_kg, record,
                                       log_pressure=log_pressure, fmt=fmt,
                                       saturation_pressure_pa=stored.saturation_pressure_pa,
                                       temperature_k=record["temperature_k"])
        elif kind == "langmuir-linear":
            body = plots.langmuir_linear_plot(stored.pressure_pa, stored.loading_mol_per_kg,
                                              record, fmt=fmt)
        else:
            p0_pa = stored.saturation_pressure_pa
            if p0_pa is None:
                raise _not_plottable(f"isotherm {isotherm_id!r} has no saturation pressure: "
                                     "a BET plot needs p/p0")
            relative = np.asarray(stored.pressure_pa, dtype=float) / p0_pa
            body = plots.bet_plot(relative, stored.loading_mol_per_kg, record["summary"], fmt=fmt)
    except ValueError as exc:  # e.g. a log axis with no positive pressure
        raise _not_plottable(f"isotherm {isotherm_id!r}: {exc}") from None
    return _image(body, fmt)


@bp.get("/sorbents/<path:sorbent_id>/qst-plot")
@require("read")
def qst_plot(sorbent_id: str):
    fmt = choice_arg("format", "svg", tuple(IMAGE_TYPES))
    adsorbate = request.args.get("adsorbate") or None
    rows = qst_rows(current_app.extensions["sorbrank"].store, sorbent_id, adsorbate)
    if not rows:
        gas = f" for {adsorbate}" if adsorbate else ""
        raise Problem(404, "Not Found", f"no isosteric heat for sorbent {sorbent_id!r}{gas} "
                      "(it needs one gas measured at two or more temperatures in one batch)",
                      slug="unknown-isosteric-heat", sorbent_id=sorbent_id)

    from sorbrank.service import plots

    return _image(plots.qst_plot(rows, fmt=fmt), fmt)
