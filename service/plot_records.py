"""What a plot draws, read from stored fit records: points, curves and labels.

Nothing here imports matplotlib. ``service/plots.py`` turns these arrays and
strings into figures; keeping the record reading apart lets the rules for
"which fit is drawn, on which pressures, and what a missing value means" be
read (and changed) without the drawing code around them.

A record is the mapping ``sorbrank fit`` emits per isotherm (``fits``,
``best_model``, ``saturation_pressure_pa``, ...); values may be None, NaN or
strings, and every reader here turns those into "not drawn" rather than an
exception, adding a line to ``notes`` where the reader should know why.
"""
from __future__ import annotations

import math
from typing import Any, Iterable, Mapping, Sequence

import numpy as np
from numpy.typing import NDArray

from sorbrank.worker.models import CATALOGUE

GRID_POINTS = 400

Record = Mapping[str, Any]
Floats = NDArray[np.float64]


def number(value: Any) -> float | None:
    """A finite float, or None for None, NaN, inf and anything non-numeric."""
    if value is None or isinstance(value, bool):
        return None
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def float_array(values: Iterable[Any] | None) -> Floats:
    if values is None:
        return np.zeros(0)
    return np.array([np.nan if number(v) is None else float(v) for v in np.ravel(values)],
                    dtype=float)


def paired_points(x_values: Iterable[Any] | None, q_values: Iterable[Any] | None,
                  x_name: str) -> tuple[Floats, Floats]:
    x = float_array(x_values)
    q = float_array(q_values)
    if x.size == 0 or q.size == 0:
        raise ValueError(f"{x_name} and loading_mol_per_kg must not be empty")
    if x.size != q.size:
        raise ValueError(f"{x_name} has {x.size} values but loading_mol_per_kg has {q.size}")
    ok = np.isfinite(x) & np.isfinite(q)
    if not np.any(ok):
        raise ValueError("no point has both a finite pressure and a finite loading")
    order = np.argsort(x[ok], kind="stable")
    return x[ok][order], q[ok][order]


def selected_fit(record: Record, fits: Sequence[Record], notes: list[str]) -> Record | None:
    best = record.get("best_model")
    if not best:
        if any(f.get("converged") for f in fits):
            notes.append("No model was selected for this isotherm.")
        return None
    for fit in fits:
        if fit.get("model") == best and fit.get("converged"):
            return fit
    notes.append(f"Selected model {best!r} has no converged fit in this record.")
    return None


def runner_up_fit(fits: Sequence[Record], selected: Record | None) -> Record | None:
    """The converged fit, other than the selected one, with the highest weight."""
    candidates = [f for f in fits
                  if f is not selected and f.get("converged")
                  and number(f.get("akaike_weight")) is not None
                  and (selected is None or f.get("model") != selected.get("model"))]
    if selected is None or not candidates:
        return None
    return max(candidates, key=lambda f: number(f.get("akaike_weight")))


def evaluate_fit(fit: Record, pressure_pa: Floats, p0_pa: float | None, t_k: float | None,
                 notes: list[str]) -> Floats | None:
    """Model loading at the given pressures; None (with a note) if impossible."""
    model_id = fit.get("model")
    model = CATALOGUE.get(model_id)
    if model is None:
        notes.append(f"Model {model_id!r} is not in this catalogue: curve not drawn.")
        return None
    params = fit.get("params") or {}
    values = [number(params.get(name)) for name in model.param_names()]
    if any(v is None for v in values):
        notes.append(f"{model.title}: parameters missing, curve not drawn.")
        return None
    if model.relative_pressure:
        if p0_pa is None or p0_pa <= 0:
            notes.append(f"{model.title} needs p/p0 but no saturation pressure is known.")
            return None
        x = pressure_pa / p0_pa
    else:
        x = pressure_pa
    x2 = np.asarray(x, dtype=float)[None, :]
    t2 = np.full((1, 1), np.nan if t_k is None else t_k)
    with np.errstate(all="ignore"):
        q = model.evaluate(x2, t2, *(np.full((1, 1), v) for v in values))
    return np.broadcast_to(np.asarray(q, dtype=float), x2.shape)[0]


def fit_curve(fit: Record, grid_pa: Floats, p0_pa: float | None, t_k: float | None,
              notes: list[str]) -> tuple[Floats, Floats] | None:
    q = evaluate_fit(fit, grid_pa, p0_pa, t_k, notes)
    if q is None:
        return None
    ok = np.isfinite(q)
    if not np.any(ok):
        notes.append(f"{model_title(fit)}: no finite values on the pressure range.")
        return None
    return grid_pa[ok], q[ok]


def residuals(fit: Record, p_pa: Floats, q: Floats, p0_pa: float | None,
              t_k: float | None) -> Floats:
    """Measured minus model; only called once the model's curve was drawn."""
    return q - evaluate_fit(fit, p_pa, p0_pa, t_k, [])


def pressure_grid(p_pa: Floats, log_pressure: bool) -> Floats:
    p_max = float(np.max(p_pa))
    if log_pressure:
        p_min = float(np.min(p_pa[p_pa > 0]))
        if p_max <= p_min:
            return np.array([p_min])
        return np.geomspace(p_min, p_max, GRID_POINTS)
    # from zero: the low-pressure shape (Henry region) is what screening reads
    return np.linspace(0.0, max(p_max, 0.0), GRID_POINTS)


def model_title(fit: Record) -> str:
    model = CATALOGUE.get(fit.get("model"))
    return model.title if model is not None else str(fit.get("model"))


def fit_label(fit: Record, role: str) -> str:
    aicc = number(fit.get("aicc"))
    weight = number(fit.get("akaike_weight"))
    parts = [f"{model_title(fit)} ({role})", "AICc " + ("n/a" if aicc is None else f"{aicc:.1f}")]
    if weight is not None:
        parts.append(f"w {weight:.2f}")
    return ", ".join(parts)


def isotherm_title(record: Record, t_k: float | None) -> str:
    bits = [str(record.get(k)) for k in ("sorbent_id", "adsorbate") if record.get(k)]
    title = " / ".join(bits) if bits else "Isotherm"
    if t_k is not None:
        title += f" at {t_k:.1f} K"
    return title + id_suffix(record)


def id_suffix(record: Record) -> str:
    iso_id = record.get("isotherm_id")
    return f" [{iso_id}]" if iso_id else ""


def fmt_value(value: float | None) -> str:
    return "n/a" if value is None else f"{value:.4g}"


def row_label(row: Record, index: int) -> str:
    bits = [str(row.get(k)) for k in ("sorbent_id", "adsorbate") if row.get(k)]
    return " / ".join(bits) if bits else f"row {index}"


def qst_series(row: Record) -> tuple[Floats, Floats, Floats | None] | None:
    """(loading mol/kg, Qst kJ/mol, stderr kJ/mol or None), or None if unusable."""
    n = float_array(row.get("qst_loading_mol_per_kg"))
    qst = float_array(row.get("qst_j_per_mol"))
    if n.size == 0 or n.size != qst.size:
        return None
    err = float_array(row.get("qst_stderr_j_per_mol"))
    ok = np.isfinite(n) & np.isfinite(qst)
    if not np.any(ok):
        return None
    order = np.argsort(n[ok], kind="stable")
    err_kj = None
    if err.size == n.size and np.any(np.isfinite(err[ok])):
        err_kj = np.abs(err[ok][order]) / 1000.0  # NaN entries draw no bar
    return n[ok][order], qst[ok][order] / 1000.0, err_kj
