"""Diagnostic plots of isotherm fits, BET and isosteric-heat results.

Figures are built with ``matplotlib.figure.Figure`` directly, never pyplot:
pyplot keeps global figure state and picks a GUI backend, neither of which a
web server or worker thread can afford. Saving goes through the Agg (PNG) or
SVG canvas chosen by the format, so no display is ever needed.

Every series carries a gid, which becomes the ``id`` of its SVG group, so the
API, the tests and anyone post-processing the SVG can find it by name:

    isotherm plot   data, fit-selected, fit-runner-up, residuals,
                    residuals-zero, note
    Langmuir plot   langmuir-data, langmuir-line, langmuir-equation, note
    BET plot        bet-data, bet-data-in-range, bet-range, bet-fit,
                    bet-annotation, note
    Qst plot        qst-<i>, qst-<i>-errorbars, qst-<i>-caps-<k> (i = row index), note

Each ``*_figure`` function returns the Figure (for callers that embed or
inspect it); each ``*_plot`` function returns the rendered bytes. Reading the
records (which fit is drawn, its curve, labels) lives in
``service/plot_records.py``; this module draws.
"""
from __future__ import annotations

import io
import threading
from typing import Any, Mapping, Sequence

import matplotlib
import numpy as np
from matplotlib.figure import Figure

from .plot_records import (
    GRID_POINTS as GRID_POINTS,  # re-exported: part of this module's public settings
    fit_curve,
    fit_label,
    fmt_value,
    id_suffix,
    isotherm_title,
    model_title,
    number,
    paired_points,
    pressure_grid,
    qst_series,
    residuals,
    row_label,
    runner_up_fit,
    selected_fit,
)

FORMATS = ("svg", "png")
PNG_DPI = 120
ISOTHERM_FIGSIZE_IN = (6.4, 5.6)
SMALL_FIGSIZE_IN = (6.4, 4.6)
BET_VIEW_MIN_RELATIVE_PRESSURE = 0.35

# Okabe-Ito colours stay distinct for colour-blind readers; marker shape and
# line style vary as well so a greyscale print still separates the series.
INK = "#000000"
BLUE = "#0072B2"
VERMILION = "#D55E00"
GREEN = "#009E73"
PURPLE = "#CC79A7"
ORANGE = "#E69F00"
SKY = "#56B4E9"
SERIES_STYLES = (
    (BLUE, "o", "-"),
    (VERMILION, "s", "--"),
    (GREEN, "^", "-."),
    (PURPLE, "D", ":"),
    (ORANGE, "v", (0, (5, 1, 1, 1))),
    (SKY, "P", (0, (1, 1))),
    (INK, "X", (0, (8, 2))),
)
NOTE_COLOUR = "#8B0000"

# Savefig reads rcParams at render time; the lock keeps two threads from
# interleaving their temporary settings.
_RENDER_LOCK = threading.Lock()
# Text stays text in SVG (searchable, accessible); a fixed hash salt and no
# date make the same plot render to the same bytes.
_SVG_RC = {"svg.fonttype": "none", "svg.hashsalt": "sorbrank"}
_METADATA = {"svg": {"Date": None, "Creator": "sorbrank"}, "png": {"Software": "sorbrank"}}


# -- public: rendered bytes ------------------------------------------------

def isotherm_plot(pressure_pa, loading_mol_per_kg, record: Mapping[str, Any] | None, *,
                  log_pressure: bool = False, fmt: str = "svg",
                  saturation_pressure_pa: float | None = None,
                  temperature_k: float | None = None) -> bytes:
    """Measured points, the selected fit and the runner-up, residuals below."""
    _check_format(fmt)
    fig = isotherm_figure(pressure_pa, loading_mol_per_kg, record, log_pressure=log_pressure,
                          saturation_pressure_pa=saturation_pressure_pa,
                          temperature_k=temperature_k)
    return render(fig, fmt)


def langmuir_linear_plot(pressure_pa, loading_mol_per_kg, record: Mapping[str, Any] | None,
                         fmt: str = "svg") -> bytes:
    """Double-reciprocal plot 1/q against 1/p with the linearised Langmuir line."""
    _check_format(fmt)
    return render(langmuir_linear_figure(pressure_pa, loading_mol_per_kg, record), fmt)


def bet_plot(relative_pressure, loading_mol_per_kg, summary: Mapping[str, Any] | None,
             fmt: str = "svg") -> bytes:
    """BET transform x/(q(1-x)) against x, chosen range shaded, fitted line."""
    _check_format(fmt)
    return render(bet_figure(relative_pressure, loading_mol_per_kg, summary), fmt)


def qst_plot(rows: Sequence[Mapping[str, Any]], fmt: str = "svg") -> bytes:
    """Isosteric heat against loading, one curve per sorbent/adsorbate row."""
    _check_format(fmt)
    return render(qst_figure(rows), fmt)


def render(fig: Figure, fmt: str) -> bytes:
    """The figure as SVG or PNG bytes (PNG at PNG_DPI; size = figsize * dpi)."""
    _check_format(fmt)
    buf = io.BytesIO()
    with _RENDER_LOCK, matplotlib.rc_context(_SVG_RC):
        fig.savefig(buf, format=fmt, dpi=PNG_DPI, metadata=_METADATA[fmt])
    return buf.getvalue()


# -- figures ---------------------------------------------------------------

def isotherm_figure(pressure_pa, loading_mol_per_kg, record: Mapping[str, Any] | None, *,
                    log_pressure: bool = False,
                    saturation_pressure_pa: float | None = None,
                    temperature_k: float | None = None) -> Figure:
    record = record or {}
    p_pa, q = paired_points(pressure_pa, loading_mol_per_kg, "pressure_pa")
    if log_pressure:
        keep = p_pa > 0  # zero pressure has no place on a log axis
        p_pa, q = p_pa[keep], q[keep]
        if p_pa.size == 0:
            raise ValueError("log pressure axis needs at least one point with pressure > 0")
    p0_pa = number(saturation_pressure_pa)
    if p0_pa is None:
        p0_pa = number(record.get("saturation_pressure_pa"))
    t_k = number(temperature_k)
    if t_k is None:
        t_k = number(record.get("temperature_k"))

    notes: list[str] = []
    fits = [f for f in (record.get("fits") or []) if isinstance(f, Mapping)]
    selected = selected_fit(record, fits, notes)
    runner_up = runner_up_fit(fits, selected)
    if record.get("ambiguous"):
        notes.append("Selection ambiguous: the runner-up is nearly as well supported.")

    grid_pa = pressure_grid(p_pa, log_pressure)
    curves = []  # (fit, role, colour, line style, gid, grid pressures, loadings)
    for fit, role, colour, style, gid in ((selected, "selected", BLUE, "-", "fit-selected"),
                                          (runner_up, "runner-up", VERMILION, "--", "fit-runner-up")):
        curve = None if fit is None else fit_curve(fit, grid_pa, p0_pa, t_k, notes)
        if curve is not None:
            curves.append((fit, role, colour, style, gid, *curve))
    selected_drawn = bool(curves) and curves[0][1] == "selected"

    fig = Figure(figsize=ISOTHERM_FIGSIZE_IN, layout="constrained")
    if selected_drawn:
        ax, ax_res = fig.subplots(2, 1, sharex=True, height_ratios=(3, 1))
    else:
        ax, ax_res = fig.subplots(1, 1), None

    (pts,) = ax.plot(p_pa / 1000.0, q, linestyle="none", marker="o", markersize=6,
                     markerfacecolor="white", markeredgecolor=INK, markeredgewidth=1.3,
                     label="Measured", zorder=3)
    pts.set_gid("data")
    for fit, role, colour, style, gid, curve_pa, q_fit in curves:
        (line,) = ax.plot(curve_pa / 1000.0, q_fit, color=colour, linestyle=style, linewidth=2.0,
                          label=fit_label(fit, role), zorder=2)
        line.set_gid(gid)

    if not fits:
        notes.append("No model fits in this record: measured points only.")
    elif not any(f.get("converged") for f in fits):
        notes.append("No model fit converged: measured points only.")

    ax.set_ylabel("Loading (mol/kg)")
    _limit_loading_axis(ax, q, [float(np.max(c[-1])) for c in curves])
    if log_pressure:
        ax.set_xscale("log")
    else:
        ax.set_xlim(left=0.0)
    ax.grid(True, color="#DDDDDD", linewidth=0.6)
    fig.suptitle(isotherm_title(record, t_k), fontsize=11)
    # below the axes: steep low-pressure data leave no safe corner inside
    fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=1,
               fontsize=8, frameon=False)

    if ax_res is not None:
        zero = ax_res.axhline(0.0, color="#777777", linestyle=":", linewidth=1.0)
        zero.set_gid("residuals-zero")
        residual = residuals(selected, p_pa, q, p0_pa, t_k)
        (res,) = ax_res.plot(p_pa / 1000.0, residual, linestyle="none", marker="s",
                             markersize=4.5, color=BLUE,
                             label=f"Residual of {model_title(selected)}")
        res.set_gid("residuals")
        ax_res.set_ylabel("Residual (mol/kg)")
        ax_res.set_xlabel("Pressure (kPa)")
        ax_res.grid(True, color="#DDDDDD", linewidth=0.6)
        ax.tick_params(labelbottom=False)
    else:
        ax.set_xlabel("Pressure (kPa)")
    _add_note(ax, notes)
    return fig


def langmuir_linear_figure(pressure_pa, loading_mol_per_kg,
                           record: Mapping[str, Any] | None) -> Figure:
    record = record or {}
    p_pa, q = paired_points(pressure_pa, loading_mol_per_kg, "pressure_pa")
    keep = (p_pa > 0) & (q > 0)  # reciprocals only exist for positive values
    inv_p, inv_q = 1.0 / p_pa[keep], 1.0 / q[keep]

    fig = Figure(figsize=SMALL_FIGSIZE_IN, layout="constrained")
    ax = fig.subplots()
    notes: list[str] = []
    if inv_p.size:
        (pts,) = ax.plot(inv_p, inv_q, linestyle="none", marker="o", markerfacecolor="white",
                         markeredgecolor=INK, markeredgewidth=1.3, label="Measured")
        pts.set_gid("langmuir-data")
    else:
        notes.append("No point with positive pressure and loading to transform.")

    lin = record.get("linearized_langmuir") or {}
    q_sat = number(lin.get("q_sat")) if isinstance(lin, Mapping) else None
    affinity = number(lin.get("affinity")) if isinstance(lin, Mapping) else None
    if q_sat and affinity:
        # 1/q = 1/q_sat + (1/(q_sat b)) (1/p)
        intercept_kg_per_mol = 1.0 / q_sat
        slope_kg_pa_per_mol = 1.0 / (q_sat * affinity)
        # without data, span 1/p up to 2b, i.e. down to half the half-loading pressure
        x_hi = float(np.max(inv_p)) * 1.05 if inv_p.size else 2.0 * affinity
        x_line = np.linspace(0.0, x_hi, 50)
        (line,) = ax.plot(x_line, intercept_kg_per_mol + slope_kg_pa_per_mol * x_line,
                          color=BLUE, linestyle="--", linewidth=1.8, label="Linearised Langmuir")
        line.set_gid("langmuir-line")
        text = ax.text(
            0.03, 0.97,
            f"intercept 1/q_sat = {fmt_value(intercept_kg_per_mol)} kg/mol\n"
            f"slope 1/(q_sat b) = {fmt_value(slope_kg_pa_per_mol)} kg·Pa/mol\n"
            f"q_sat = {fmt_value(q_sat)} mol/kg, b = {fmt_value(affinity)} 1/Pa",
            transform=ax.transAxes, va="top", ha="left", fontsize=8.5,
            bbox={"boxstyle": "round", "facecolor": "white", "edgecolor": "#999999"})
        text.set_gid("langmuir-equation")
        ax.legend(loc="lower right", fontsize=8)
    else:
        notes.append("No linearised Langmuir line in this record.")

    ax.set_xlabel("1 / pressure (1/Pa)")
    ax.set_ylabel("1 / loading (kg/mol)")
    ax.set_xlim(left=0.0)
    ax.grid(True, color="#DDDDDD", linewidth=0.6)
    fig.suptitle(f"Double-reciprocal Langmuir plot{id_suffix(record)}", fontsize=11)
    _add_note(ax, notes)
    return fig


def bet_figure(relative_pressure, loading_mol_per_kg,
               summary: Mapping[str, Any] | None) -> Figure:
    summary = summary or {}
    x, q = paired_points(relative_pressure, loading_mol_per_kg, "relative_pressure")
    keep = (x > 0) & (x < 1) & (q > 0)  # the transform is defined only there
    x, q = x[keep], q[keep]
    y_kg_per_mol = x / (q * (1.0 - x))

    low = number(summary.get("bet_range_relative_pressure_low"))
    high = number(summary.get("bet_range_relative_pressure_high"))
    has_range = low is not None and high is not None and high > low

    fig = Figure(figsize=SMALL_FIGSIZE_IN, layout="constrained")
    ax = fig.subplots()
    notes: list[str] = []
    in_range = (x >= low) & (x <= high) if has_range else np.zeros(x.shape, dtype=bool)

    if has_range:
        span = ax.axvspan(low, high, color="#BBBBBB", alpha=0.35, linewidth=0,
                          label=f"Chosen range p/p0 {low:.3g}-{high:.3g}", zorder=0)
        span.set_gid("bet-range")
    if np.any(~in_range):
        (out_pts,) = ax.plot(x[~in_range], y_kg_per_mol[~in_range], linestyle="none",
                             marker="o", markerfacecolor="white", markeredgecolor=INK,
                             markeredgewidth=1.2, label="Measured", zorder=3)
        out_pts.set_gid("bet-data")
    if np.any(in_range):
        (in_pts,) = ax.plot(x[in_range], y_kg_per_mol[in_range], linestyle="none", marker="s",
                            color=BLUE, markeredgecolor=INK, label="Measured, in range",
                            zorder=4)
        in_pts.set_gid("bet-data-in-range")
    if x.size == 0:
        notes.append("No point with 0 < p/p0 < 1 and positive loading to transform.")

    c = number(summary.get("bet_c"))
    n_m = number(summary.get("bet_monolayer_mol_per_kg"))
    area = number(summary.get("bet_area_m2_per_g"))
    if has_range and c and n_m:
        # x/(q(1-x)) = 1/(n_m C) + (C-1)/(n_m C) x
        x_line = np.linspace(low, high, 50)
        (line,) = ax.plot(x_line, 1.0 / (n_m * c) + (c - 1.0) / (n_m * c) * x_line,
                          color=VERMILION, linestyle="--", linewidth=1.8, label="BET fit",
                          zorder=5)
        line.set_gid("bet-fit")
    if has_range:
        annotation = (f"BET area = {fmt_value(area)} m2/g\nC = {fmt_value(c)}\n"
                      f"n_m = {fmt_value(n_m)} mol/kg\nrange p/p0 {low:.3g} to {high:.3g}")
        # the transform explodes towards p/p0 = 1; zoom so the range stays readable
        x_view = max(BET_VIEW_MIN_RELATIVE_PRESSURE, 2.0 * high)
        shown = x <= x_view
        if np.any(shown) and not np.all(shown):
            ax.set_xlim(0.0, x_view)
            ax.set_ylim(0.0, 1.1 * float(np.max(y_kg_per_mol[shown])))
            annotation += f"\n{np.count_nonzero(~shown)} points above p/p0 {x_view:.2g} not in view"
        else:
            ax.set_xlim(left=0.0)
        text = ax.text(
            0.03, 0.97, annotation,
            transform=ax.transAxes, va="top", ha="left", fontsize=8.5,
            bbox={"boxstyle": "round", "facecolor": "white", "edgecolor": "#999999"})
        text.set_gid("bet-annotation")
    else:
        ax.set_xlim(left=0.0)
        notes.append("No valid BET range for this isotherm: no BET area is reported.")

    ax.set_xlabel("Relative pressure p/p0 (dimensionless)")
    ax.set_ylabel("x / (q (1 - x)) (kg/mol)")
    ax.grid(True, color="#DDDDDD", linewidth=0.6)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="lower right", fontsize=8)
    fig.suptitle("BET plot", fontsize=11)
    _add_note(ax, notes)
    return fig


def qst_figure(rows: Sequence[Mapping[str, Any]]) -> Figure:
    rows = list(rows or [])
    if not rows:
        raise ValueError("qst plot needs at least one row")
    fig = Figure(figsize=SMALL_FIGSIZE_IN, layout="constrained")
    ax = fig.subplots()
    notes: list[str] = []
    handles, labels = [], []
    for i, row in enumerate(rows):
        label = row_label(row, i)
        series = qst_series(row)
        if series is None:
            notes.append(f"{label}: no isosteric heat values.")
            continue
        n_mol_per_kg, qst_kj, err_kj = series
        colour, marker, style = SERIES_STYLES[i % len(SERIES_STYLES)]
        if err_kj is not None:
            cont = ax.errorbar(n_mol_per_kg, qst_kj, yerr=err_kj, color=colour, marker=marker,
                               linestyle=style, markersize=5, capsize=3, linewidth=1.5,
                               label=label)
            cont.lines[0].set_gid(f"qst-{i}")
            handles.append(cont)
            for k, bars in enumerate(cont.lines[2]):
                bars.set_gid(f"qst-{i}-errorbars" if k == 0 else f"qst-{i}-errorbars-{k}")
            for k, cap in enumerate(cont.lines[1]):
                cap.set_gid(f"qst-{i}-caps-{k}")
        else:
            (line,) = ax.plot(n_mol_per_kg, qst_kj, color=colour, marker=marker,
                              linestyle=style, markersize=5, linewidth=1.5, label=label)
            line.set_gid(f"qst-{i}")
            handles.append(line)
        labels.append(label)
    ax.set_xlabel("Loading (mol/kg)")
    ax.set_ylabel("Isosteric heat Qst (kJ/mol)")
    # a nearly constant heat would otherwise be drawn as "1e-5+3e1" offsets
    ax.ticklabel_format(axis="y", useOffset=False, style="plain")
    ax.grid(True, color="#DDDDDD", linewidth=0.6)
    fig.suptitle("Isosteric heat of adsorption", fontsize=11)
    if handles:  # in row order, outside the axes so no curve is covered
        fig.legend(handles, labels, loc="outside lower center", ncols=min(3, len(handles)),
                   fontsize=8, frameon=False)
    _add_note(ax, notes)
    return fig


# -- helpers ---------------------------------------------------------------

def _check_format(fmt: str) -> None:
    if fmt not in FORMATS:
        raise ValueError(f"unknown plot format {fmt!r}; use one of {', '.join(FORMATS)}")


def _limit_loading_axis(ax, q: np.ndarray, curve_tops: list[float]) -> None:
    """Frame the data; a curve that shoots far above the data is cut off
    rather than squashing the measured points into a thin band."""
    q_max = float(np.max(q))
    q_min = float(np.min(q))
    if q_max <= 0:
        return
    top = max([q_max] + [min(t, 1.5 * q_max) for t in curve_tops])
    ax.set_ylim(min(0.0, q_min) - 0.03 * top, 1.06 * top)


def _add_note(ax, notes: list[str]) -> None:
    """Notes go in the axes title slot so they never cover data."""
    if not notes:
        return
    unique = list(dict.fromkeys(notes))
    title = ax.set_title("\n".join(unique), fontsize=8.5, loc="left", color=NOTE_COLOUR)
    title.set_gid("note")
