"""Plots of stored results: one isotherm's fit, Langmuir or BET view, and a
sorbent's isosteric heat.

Nothing is refitted here: what is drawn is read through the store's read
model (``sorbrank.worker.store.readmodel``), so the picture always shows what
the rankings were built from.
"""
from __future__ import annotations

import numpy as np
from flask import Blueprint, Response, current_app, request

from sorbrank.worker.store import is_batch_id
from sorbrank.worker.store.readmodel import load_isotherm, qst_rows
from sorbrank.worker.store.rankings import UnknownAdsorbate, canonical_adsorbate

from ..auth import require
from ..problems import Problem
from .formats import bool_arg, choice_arg

bp = Blueprint("plots", __name__)

KINDS = ("isotherm", "langmuir-linear", "bet")
IMAGE_TYPES = {"svg": "image/svg+xml", "png": "image/png"}


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
    rows = qst_rows(current_app.extensions["sorbrank"].store, sorbent_id)
    if adsorbate is not None:
        # the gas name as intake stores it (co2, carbon dioxide -> CO2), as the rankings match it
        try:
            adsorbate = canonical_adsorbate(adsorbate, stored=lambda: [r["adsorbate"] for r in rows])
        except UnknownAdsorbate as exc:
            raise Problem(400, "Bad Request", str(exc), slug="unknown-adsorbate",
                          parameter="adsorbate", adsorbate=exc.name,
                          suggestions=exc.suggestions) from None
        rows = [r for r in rows if r["adsorbate"] == adsorbate]
    if not rows:
        gas = f" for {adsorbate}" if adsorbate else ""
        raise Problem(404, "Not Found", f"no isosteric heat for sorbent {sorbent_id!r}{gas} "
                      "(it needs one gas measured at two or more temperatures in one batch)",
                      slug="unknown-isosteric-heat", sorbent_id=sorbent_id)

    from sorbrank.service import plots

    return _image(plots.qst_plot(rows, fmt=fmt), fmt)
