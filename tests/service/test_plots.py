"""Plots: SVG structure (series ids, unit labels), drawn values against
independently written model equations, PNG encoding, graceful degradation,
and the ``sorbrank plot`` command on real files through the real intake and pipeline."""
from __future__ import annotations

import argparse
import io
import struct
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from matplotlib import image as mpimg
from scipy.optimize import curve_fit

from sorbrank.service import plots
from sorbrank.service.commands import plot as plot_command
from sorbrank.worker.models import CATALOGUE

SVG_NS = "{http://www.w3.org/2000/svg}"
AVOGADRO_PER_MOL = 6.02214076e23
N2_CROSS_SECTION_M2 = 0.162e-18


# -- independent scalar equations (the published forms) ----------------------

def langmuir_eq(p_pa, q_sat, affinity):
    return q_sat * affinity * p_pa / (1.0 + affinity * p_pa)


def dual_site_eq(p_pa, q1, b1, q2, b2):
    return langmuir_eq(p_pa, q1, b1) + langmuir_eq(p_pa, q2, b2)


def henry_eq(p_pa, k_h):
    return k_h * p_pa


def bet_eq(x, n_m, c):
    return n_m * c * x / ((1.0 - x) * (1.0 - x + c * x))


# -- truth-known data and a realistic record ----------------------------------

TRUTH_DSL = dict(q1=1.5, b1=5e-4, q2=3.0, b2=5e-6)


def dual_site_data():
    p_pa = np.geomspace(200.0, 3.0e5, 18)
    rng = np.random.default_rng(11)
    q = dual_site_eq(p_pa, **TRUTH_DSL) + rng.normal(0.0, 0.004, p_pa.size)
    return p_pa, q


def fit_entry(model_id, names, f_kpa, p_pa, q, guess, to_canonical):
    """curve_fit in kPa (well scaled), then parameters in canonical units."""
    popt, pcov = curve_fit(f_kpa, p_pa / 1000.0, q, p0=guess, bounds=(0.0, np.inf), maxfev=20000)
    sse = float(np.sum((q - f_kpa(p_pa / 1000.0, *popt)) ** 2))
    n, k = q.size, len(popt)
    aic = n * np.log(sse / n) + 2 * k
    values = to_canonical(popt)
    stderr = to_canonical(np.sqrt(np.diag(pcov)))
    return {
        "model": model_id, "converged": True, "n_params": k, "sse": sse,
        "params": dict(zip(names, values)), "stderr": dict(zip(names, stderr)),
        "ci95": {nm: [v - 1.96 * s, v + 1.96 * s] for nm, v, s in zip(names, values, stderr)},
        "aic": aic, "aicc": aic + 2 * k * (k + 1) / (n - k - 1), "bic": n * np.log(sse / n) + k * np.log(n),
    }


def make_record(p_pa, q):
    lang = fit_entry("langmuir", ["q_sat", "affinity"],
                     lambda p, qs, b: langmuir_eq(p, qs, b), p_pa, q, [4.0, 0.05],
                     lambda v: [float(v[0]), float(v[1]) / 1000.0])
    dsl = fit_entry("dual_site_langmuir", ["q_sat_1", "affinity_1", "q_sat_2", "affinity_2"],
                    lambda p, a, b, c, d: dual_site_eq(p, a, b, c, d), p_pa, q,
                    [1.0, 1.0, 3.0, 0.01],
                    lambda v: [float(v[0]), float(v[1]) / 1000.0, float(v[2]), float(v[3]) / 1000.0])
    failed = {"model": "henry", "converged": False, "params": {"k_h": None}, "aicc": None,
              "akaike_weight": None, "n_params": 1}
    fits = [lang, dsl]
    aicc = np.array([f["aicc"] for f in fits])
    w = np.exp(-0.5 * (aicc - aicc.min()))
    for f, wi in zip(fits, w / w.sum()):
        f["akaike_weight"] = float(wi)
    best = max(fits, key=lambda f: f["akaike_weight"])
    slope, intercept = np.polyfit(1.0 / p_pa, 1.0 / q, 1)
    return {
        "isotherm_id": "iso-1", "sorbent_id": "MAT-A", "adsorbate": "CO2",
        "temperature_k": 298.15, "n_points": int(q.size), "best_model": best["model"],
        "ambiguous": False, "flags": [], "fits": [failed, lang, dsl],
        "linearized_langmuir": {"q_sat": 1.0 / intercept, "affinity": intercept / slope},
        "summary": {},
    }


@pytest.fixture(scope="module")
def dsl_case():
    p_pa, q = dual_site_data()
    record = make_record(p_pa, q)
    # the precondition the plot tests rely on: the data select dual-site
    assert record["best_model"] == "dual_site_langmuir"
    return p_pa, q, record


# -- helpers ---------------------------------------------------------------

def svg_ids(data: bytes) -> list[str]:
    root = ET.fromstring(data)
    return [el.get("id") for el in root.iter() if el.get("id")]


def svg_texts(data: bytes) -> list[str]:
    root = ET.fromstring(data)
    return ["".join(el.itertext()) for el in root.iter(SVG_NS + "text")]


def svg_group(data: bytes, gid: str):
    root = ET.fromstring(data)
    return next(el for el in root.iter() if el.get("id") == gid)


def artists(fig, gid):
    return [a for a in fig.findobj() if a.get_gid() == gid]


def one_line(fig, gid):
    (line,) = artists(fig, gid)
    return np.asarray(line.get_xdata(), float), np.asarray(line.get_ydata(), float)


# -- isotherm plot -----------------------------------------------------------

def test_isotherm_svg_has_every_series_and_unit_labels(dsl_case):
    p_pa, q, record = dsl_case
    svg = plots.isotherm_plot(p_pa, q, record)
    ids = svg_ids(svg)
    for gid in ("data", "fit-selected", "fit-runner-up", "residuals", "residuals-zero"):
        assert gid in ids
    assert len(ids) == len(set(ids)), "SVG ids must be unique"
    assert len(svg_group(svg, "data")) > 0 and len(svg_group(svg, "fit-selected")) > 0
    texts = svg_texts(svg)
    assert "Pressure (kPa)" in texts
    assert "Loading (mol/kg)" in texts
    assert "Residual (mol/kg)" in texts
    legend = [t for t in texts if "AICc" in t]
    aicc_dsl = record["fits"][2]["aicc"]
    assert any(t.startswith("Dual-site Langmuir (selected)") and f"{aicc_dsl:.1f}" in t for t in legend)
    assert any(t.startswith("Langmuir (runner-up)") for t in legend)
    assert "note" not in ids


def test_drawn_curves_and_residuals_are_the_fitted_models(dsl_case):
    p_pa, q, record = dsl_case
    fig = plots.isotherm_figure(p_pa, q, record)
    dsl = record["fits"][2]["params"]
    lang = record["fits"][1]["params"]

    x_kpa, y = one_line(fig, "fit-selected")
    assert x_kpa.size > 100 and x_kpa.max() == pytest.approx(p_pa.max() / 1000.0)
    expected = dual_site_eq(x_kpa * 1000.0, dsl["q_sat_1"], dsl["affinity_1"],
                            dsl["q_sat_2"], dsl["affinity_2"])
    np.testing.assert_allclose(y, expected, rtol=1e-12, atol=1e-12)
    # and the fit itself is close to the truth that generated the data
    np.testing.assert_allclose(y, dual_site_eq(x_kpa * 1000.0, **TRUTH_DSL), atol=0.03)

    x_kpa, y = one_line(fig, "fit-runner-up")
    np.testing.assert_allclose(y, langmuir_eq(x_kpa * 1000.0, lang["q_sat"], lang["affinity"]),
                               rtol=1e-12, atol=1e-12)

    x_kpa, res = one_line(fig, "residuals")
    np.testing.assert_allclose(x_kpa * 1000.0, p_pa)
    model_q = dual_site_eq(p_pa, dsl["q_sat_1"], dsl["affinity_1"], dsl["q_sat_2"], dsl["affinity_2"])
    np.testing.assert_allclose(res, q - model_q, rtol=1e-10, atol=1e-12)

    x_kpa, y = one_line(fig, "data")
    np.testing.assert_allclose(x_kpa * 1000.0, p_pa)
    np.testing.assert_allclose(y, q)


def test_selected_and_runner_up_differ_in_line_style_not_only_colour(dsl_case):
    p_pa, q, record = dsl_case
    fig = plots.isotherm_figure(p_pa, q, record)
    (sel,) = artists(fig, "fit-selected")
    (run,) = artists(fig, "fit-runner-up")
    assert sel.get_linestyle() != run.get_linestyle()


def test_runner_up_is_the_converged_fit_with_next_highest_weight(dsl_case):
    p_pa, q, _ = dsl_case
    record = {
        "best_model": "langmuir",
        "fits": [
            {"model": "dual_site_langmuir", "converged": True, "akaike_weight": 0.10, "aicc": 5.0,
             "params": {"q_sat_1": 1.0, "affinity_1": 1e-4, "q_sat_2": 1.0, "affinity_2": 1e-6}},
            {"model": "bet", "converged": False, "akaike_weight": 0.35, "aicc": 1.0,
             "params": {"n_m": 1.0, "c": 10.0}},
            {"model": "henry", "converged": True, "akaike_weight": 0.25, "aicc": 3.0,
             "params": {"k_h": 2e-5}},
            {"model": "langmuir", "converged": True, "akaike_weight": 0.65, "aicc": 0.0,
             "params": {"q_sat": 4.0, "affinity": 2e-5}},
        ],
    }
    fig = plots.isotherm_figure(p_pa, q, record)
    (run,) = artists(fig, "fit-runner-up")
    assert run.get_label().startswith(CATALOGUE["henry"].title + " (runner-up)")
    x_kpa, y = one_line(fig, "fit-runner-up")
    np.testing.assert_allclose(y, henry_eq(x_kpa * 1000.0, 2e-5), rtol=1e-12)


def test_log_pressure_axis_drops_zero_pressure(dsl_case):
    p_pa, q, record = dsl_case
    p_with_zero = np.concatenate([[0.0], p_pa])
    q_with_zero = np.concatenate([[0.0], q])
    fig = plots.isotherm_figure(p_with_zero, q_with_zero, record, log_pressure=True)
    assert all(ax.get_xscale() == "log" for ax in fig.axes)
    x_kpa, _ = one_line(fig, "data")
    assert x_kpa.min() > 0 and x_kpa.size == p_pa.size
    x_kpa, _ = one_line(fig, "fit-selected")
    assert x_kpa.min() == pytest.approx(p_pa.min() / 1000.0)
    svg = plots.isotherm_plot(p_with_zero, q_with_zero, record, log_pressure=True)
    assert "fit-selected" in svg_ids(svg)
    linear = plots.isotherm_figure(p_pa, q, record)
    assert linear.axes[0].get_xscale() == "linear"


def test_relative_pressure_model_is_drawn_against_p_over_p0():
    p0_pa = 1.0e5
    x = np.linspace(0.03, 0.35, 12)
    q = bet_eq(x, 2.0, 80.0)
    record = {"best_model": "bet", "fits": [
        {"model": "bet", "converged": True, "akaike_weight": 1.0, "aicc": -90.0,
         "params": {"n_m": 2.0, "c": 80.0}}]}
    fig = plots.isotherm_figure(x * p0_pa, q, record, saturation_pressure_pa=p0_pa)
    x_kpa, y = one_line(fig, "fit-selected")
    np.testing.assert_allclose(y, bet_eq(x_kpa * 1000.0 / p0_pa, 2.0, 80.0), rtol=1e-12)
    _, res = one_line(fig, "residuals")
    np.testing.assert_allclose(res, 0.0, atol=1e-12)

    without_p0 = plots.isotherm_plot(x * p0_pa, q, record)
    ids = svg_ids(without_p0)
    assert "fit-selected" not in ids and "residuals" not in ids and "note" in ids
    assert any("saturation pressure" in t for t in svg_texts(without_p0))


def test_no_converged_fit_plots_data_with_a_note(dsl_case):
    p_pa, q, _ = dsl_case
    record = {"isotherm_id": "x", "best_model": None, "fits": [
        {"model": "langmuir", "converged": False, "params": {"q_sat": None, "affinity": None}}]}
    svg = plots.isotherm_plot(p_pa, q, record)
    ids = svg_ids(svg)
    assert "data" in ids and "note" in ids
    assert "fit-selected" not in ids and "residuals" not in ids
    assert any("No model fit converged" in t for t in svg_texts(svg))


@pytest.mark.parametrize("record", [None, {}, {"fits": None, "summary": None},
                                    {"best_model": "langmuir", "fits": [{"model": "langmuir"}]},
                                    {"best_model": "no_such_model", "fits": [
                                        {"model": "no_such_model", "converged": True,
                                         "params": {}, "akaike_weight": 1.0}]}])
def test_sparse_records_never_raise(dsl_case, record):
    p_pa, q, _ = dsl_case
    for data in (plots.isotherm_plot(p_pa, q, record),
                 plots.langmuir_linear_plot(p_pa, q, record)):
        assert "langmuir-line" not in svg_ids(data) and "fit-selected" not in svg_ids(data)


def test_unknown_runner_up_model_is_skipped_with_note(dsl_case):
    p_pa, q, record = dsl_case
    record = dict(record, fits=[dict(f) for f in record["fits"]])
    record["fits"][1]["model"] = "model_from_the_future"
    svg = plots.isotherm_plot(p_pa, q, record)
    ids = svg_ids(svg)
    assert "fit-selected" in ids and "fit-runner-up" not in ids
    assert any("model_from_the_future" in t for t in svg_texts(svg))


@pytest.mark.parametrize("call", [
    lambda: plots.isotherm_plot([], [], {}),
    lambda: plots.isotherm_plot([1.0, 2.0], [1.0], {}),
    lambda: plots.isotherm_plot([None, float("nan")], [1.0, 2.0], {}),
    lambda: plots.isotherm_plot([1.0], [1.0], {}, fmt="gif"),
    lambda: plots.bet_plot([], [], {}),
    lambda: plots.langmuir_linear_plot([], [], {}),
    lambda: plots.qst_plot([]),
])
def test_unusable_input_raises_value_error(call):
    with pytest.raises(ValueError):
        call()


# -- Langmuir double-reciprocal --------------------------------------------

def test_langmuir_linear_line_matches_record_and_is_labelled(dsl_case):
    p_pa = np.geomspace(1e3, 2e5, 10)
    q = langmuir_eq(p_pa, 4.0, 2e-5)
    record = {"linearized_langmuir": {"q_sat": 4.0, "affinity": 2e-5}}
    fig = plots.langmuir_linear_figure(p_pa, q, record)
    x, y = one_line(fig, "langmuir-data")
    np.testing.assert_allclose(x, 1.0 / p_pa)
    np.testing.assert_allclose(y, 1.0 / q)
    x, y = one_line(fig, "langmuir-line")
    # noise-free Langmuir data lie exactly on 1/q = 1/q_sat + 1/(q_sat b p)
    np.testing.assert_allclose(np.interp(1.0 / p_pa, x, y), 1.0 / q, rtol=1e-9)
    assert y[0] == pytest.approx(0.25)  # x starts at 0: the intercept

    svg = plots.langmuir_linear_plot(p_pa, q, record)
    ids = svg_ids(svg)
    assert {"langmuir-data", "langmuir-line", "langmuir-equation"} <= set(ids)
    texts = svg_texts(svg)
    assert "1 / pressure (1/Pa)" in texts and "1 / loading (kg/mol)" in texts
    joined = "\n".join(texts)
    assert "intercept 1/q_sat = 0.25 kg/mol" in joined
    assert "slope 1/(q_sat b) = 1.25e+04 kg·Pa/mol" in joined


# -- BET ---------------------------------------------------------------------

def bet_case():
    x = np.linspace(0.02, 0.45, 16)
    q = bet_eq(x, 2.0, 80.0)
    low, high = x[2], x[9]  # a range runs from one measured point to another
    inside = (x >= low) & (x <= high)
    slope, intercept = np.polyfit(x[inside], x[inside] / (q[inside] * (1 - x[inside])), 1)
    n_m, c = 1.0 / (slope + intercept), slope / intercept + 1.0
    assert n_m == pytest.approx(2.0) and c == pytest.approx(80.0)
    summary = {"bet_range_relative_pressure_low": low, "bet_range_relative_pressure_high": high,
               "bet_c": c, "bet_monolayer_mol_per_kg": n_m,
               "bet_area_m2_per_g": n_m * AVOGADRO_PER_MOL * N2_CROSS_SECTION_M2 / 1000.0}
    return x, q, summary, inside


def test_bet_plot_highlights_range_and_draws_the_bet_line():
    x, q, summary, inside = bet_case()
    fig = plots.bet_figure(x, q, summary)
    (span,) = artists(fig, "bet-range")
    assert span.get_x() == pytest.approx(x[2])
    assert span.get_x() + span.get_width() == pytest.approx(x[9])
    assert inside.sum() == 8
    xin, yin = one_line(fig, "bet-data-in-range")
    np.testing.assert_allclose(xin, x[inside])
    np.testing.assert_allclose(yin, x[inside] / (q[inside] * (1 - x[inside])))
    xout, _ = one_line(fig, "bet-data")
    np.testing.assert_allclose(xout, x[~inside])
    xl, yl = one_line(fig, "bet-fit")
    assert xl.min() == pytest.approx(x[2]) and xl.max() == pytest.approx(x[9])
    np.testing.assert_allclose(np.interp(xin, xl, yl), yin, rtol=1e-9)

    assert fig.axes[0].get_xlim()[0] == 0.0

    svg = plots.bet_plot(x, q, summary)
    ids = svg_ids(svg)
    assert {"bet-range", "bet-data", "bet-data-in-range", "bet-fit", "bet-annotation"} <= set(ids)
    assert "note" not in ids
    texts = svg_texts(svg)
    assert "x / (q (1 - x)) (kg/mol)" in texts
    assert "Relative pressure p/p0 (dimensionless)" in texts
    assert f"BET area = {summary['bet_area_m2_per_g']:.4g} m2/g" in "\n".join(texts)


def test_bet_view_zooms_on_the_range_but_keeps_every_point():
    x = np.linspace(0.02, 0.95, 30)
    q = bet_eq(x, 2.0, 80.0)
    summary = {"bet_range_relative_pressure_low": x[1], "bet_range_relative_pressure_high": x[6],
               "bet_c": 80.0, "bet_monolayer_mol_per_kg": 2.0, "bet_area_m2_per_g": 195.1}
    fig = plots.bet_figure(x, q, summary)
    ax = fig.axes[0]
    x_view = max(plots.BET_VIEW_MIN_RELATIVE_PRESSURE, 2.0 * x[6])
    assert ax.get_xlim() == pytest.approx((0.0, x_view))
    y = x / (q * (1 - x))
    assert ax.get_ylim()[1] == pytest.approx(1.1 * y[x <= x_view].max())
    xin, _ = one_line(fig, "bet-data-in-range")
    xout, _ = one_line(fig, "bet-data")
    assert xin.size + xout.size == x.size  # hidden by the view, not dropped
    hidden = int(np.count_nonzero(x > x_view))
    (note,) = artists(fig, "bet-annotation")
    assert f"{hidden} points above p/p0" in note.get_text()


@pytest.mark.parametrize("summary", [None, {}, {"bet_range_relative_pressure_low": None,
                                                "bet_range_relative_pressure_high": None,
                                                "bet_area_m2_per_g": None}])
def test_bet_plot_without_valid_range_says_so(summary):
    x, q, _, _ = bet_case()
    svg = plots.bet_plot(x, q, summary)
    ids = svg_ids(svg)
    assert "bet-data" in ids and "note" in ids
    assert "bet-range" not in ids and "bet-fit" not in ids
    assert any(t.startswith("No valid BET range") for t in svg_texts(svg))


# -- isosteric heat ----------------------------------------------------------

QST_ROWS = [
    {"sorbent_id": "MAT-A", "adsorbate": "CO2", "qst_loading_mol_per_kg": [0.5, 1.0, 1.5, 2.0],
     "qst_j_per_mol": [32000.0, 30500.0, 29000.0, 28200.0],
     "qst_stderr_j_per_mol": [900.0, None, 700.0, 650.0]},
    {"sorbent_id": "MAT-B", "adsorbate": "CO2", "qst_loading_mol_per_kg": [0.5, 1.0, None, 2.0],
     "qst_j_per_mol": [24000.0, 23500.0, 23000.0, float("nan")]},
    {"sorbent_id": "MAT-C", "adsorbate": "N2", "qst_loading_mol_per_kg": None,
     "qst_j_per_mol": None},
    {"sorbent_id": "MAT-D", "adsorbate": "CH4", "qst_loading_mol_per_kg": [0.2, 0.4],
     "qst_j_per_mol": [17000.0, 16500.0]},
]


def test_qst_plot_series_in_kj_per_mol_with_error_bars():
    fig = plots.qst_figure(QST_ROWS)
    n, qst_kj = one_line(fig, "qst-0")
    np.testing.assert_allclose(n, [0.5, 1.0, 1.5, 2.0])
    np.testing.assert_allclose(qst_kj, [32.0, 30.5, 29.0, 28.2])
    n, qst_kj = one_line(fig, "qst-1")  # points with a missing value are left out
    np.testing.assert_allclose(n, [0.5, 1.0])
    np.testing.assert_allclose(qst_kj, [24.0, 23.5])
    assert artists(fig, "qst-2") == []

    svg = plots.qst_plot(QST_ROWS)
    ids = svg_ids(svg)
    assert {"qst-0", "qst-0-errorbars", "qst-1", "qst-3", "note"} <= set(ids)
    assert "qst-1-errorbars" not in ids and "qst-2" not in ids
    assert len(ids) == len(set(ids))
    texts = svg_texts(svg)
    assert "Isosteric heat Qst (kJ/mol)" in texts and "Loading (mol/kg)" in texts
    assert "MAT-A / CO2" in texts and any("MAT-C / N2" in t for t in texts)


def test_qst_series_differ_in_marker_and_line_style():
    fig = plots.qst_figure(QST_ROWS)
    lines = [artists(fig, f"qst-{i}")[0] for i in (0, 1, 3)]
    assert len({ln.get_marker() for ln in lines}) == 3
    assert len({str(ln.get_linestyle()) for ln in lines}) == 3
    # the same holds for every style the cycle can hand out
    assert len({m for _, m, _ in plots.SERIES_STYLES}) == len(plots.SERIES_STYLES)
    assert len({str(ls) for _, _, ls in plots.SERIES_STYLES}) == len(plots.SERIES_STYLES)


# -- PNG ---------------------------------------------------------------------

def test_png_signature_size_and_content(dsl_case):
    p_pa, q, record = dsl_case
    png = plots.isotherm_plot(p_pa, q, record, fmt="png", log_pressure=True)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    assert png[12:16] == b"IHDR"
    width, height = struct.unpack(">II", png[16:24])
    assert 100 <= plots.PNG_DPI <= 150
    assert (width, height) == (round(plots.ISOTHERM_FIGSIZE_IN[0] * plots.PNG_DPI),
                               round(plots.ISOTHERM_FIGSIZE_IN[1] * plots.PNG_DPI))
    pixels = mpimg.imread(io.BytesIO(png), format="png")
    assert pixels.shape[:2] == (height, width)
    grey = pixels[..., :3].mean(axis=-1)
    assert grey.var() > 1e-3
    assert np.mean(grey < 0.5) > 0.005  # real dark ink, not a blank page


def test_svg_output_is_reproducible(dsl_case):
    p_pa, q, record = dsl_case
    assert plots.isotherm_plot(p_pa, q, record) == plots.isotherm_plot(p_pa, q, record)


# -- sorbrank plot -----------------------------------------------------------

def _parser():
    parser = argparse.ArgumentParser(prog="sorbrank")
    plot_command.register(parser.add_subparsers(dest="command"))
    return parser


@pytest.fixture
def input_file(monkeypatch, tmp_path, dsl_case):
    """A real input file for the command, run through the real intake and
    pipeline: iso-1 (CH4 at 298 K, no p0: supercritical), iso-2 (N2 at 77 K
    in p/p0) and iso-bad (a negative pressure, rejected at intake)."""
    p_pa, q, _ = dsl_case
    monkeypatch.chdir(tmp_path)
    x = np.linspace(0.02, 0.3, 8)
    # the relative-pressure isotherm goes in its own file: a file has one pressure column
    lines = ["isotherm_id,sorbent_id,adsorbate,temperature_k,pressure_pa,loading_mol_per_kg"]
    lines += [f"iso-1,MAT-A,CH4,298.15,{float(p)!r},{float(v)!r}" for p, v in zip(p_pa, q)]
    lines += [f"iso-bad,MAT-C,CO2,298.15,{p},{v}" for p, v in ((-5, 0.1), (10, 0.2), (20, 0.3))]
    (tmp_path / "in.csv").write_text("\n".join(lines) + "\n")
    relative = ["isotherm_id,sorbent_id,adsorbate,temperature_k,pressure_relative,loading_mol_per_kg"]
    relative += [f"iso-2,MAT-B,N2,77.35,{float(v)!r},{float(bet_eq(v, 8.0, 120.0))!r}" for v in x]
    (tmp_path / "in_relative.csv").write_text("\n".join(relative) + "\n")
    return tmp_path


def test_plot_command_writes_requested_plot(tmp_path, input_file, capsys):
    out = tmp_path / "fit.svg"
    args = _parser().parse_args(["plot", "in.csv", "--isotherm", "iso-1", "--out", str(out)])
    assert args.func(args) == 0
    assert {"data", "fit-selected", "fit-runner-up", "residuals"} <= set(svg_ids(out.read_bytes()))

    png_out = tmp_path / "lin.png"
    args = _parser().parse_args(["plot", "in.csv", "--isotherm", "iso-1", "--kind",
                                 "langmuir-linear", "--out", str(png_out)])
    assert args.func(args) == 0
    assert png_out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_plot_command_default_name_and_bet(tmp_path, input_file):
    args = _parser().parse_args(["plot", "in_relative.csv", "--isotherm", "iso-2", "--kind", "bet"])
    assert args.func(args) == 0
    assert {"bet-data-in-range", "bet-range", "bet-fit"} <= set(svg_ids((tmp_path / "iso-2_bet.svg").read_bytes()))


@pytest.mark.parametrize("argv, message", [
    (["in.csv", "--isotherm", "nope"], "isotherms present: iso-1"),
    (["in.csv", "--isotherm", "iso-bad"], "rejected at intake"),
    (["in.csv", "--isotherm", "iso-1", "--kind", "bet"], "no saturation pressure"),
    (["missing.csv", "--isotherm", "iso-1"], "no such file: missing.csv"),
])
def test_plot_command_explains_unplottable_requests(tmp_path, input_file, capsys, argv, message):
    args = _parser().parse_args(["plot", *argv, "--out", str(tmp_path / "x.svg")])
    assert args.func(args) == 2
    assert message in capsys.readouterr().err
    assert not (tmp_path / "x.svg").exists()


def test_plot_help_teaches(capsys):
    with pytest.raises(SystemExit) as stop:
        _parser().parse_args(["plot", "--help"])
    assert stop.value.code == 0
    text = capsys.readouterr().out
    for needle in ("--isotherm", "--kind", "langmuir-linear", "--log-pressure", "--format",
                   "--out", "AICc", "p/p0", "examples:"):
        assert needle in text


def test_plot_command_end_to_end_with_real_intake_and_pipeline(tmp_path):
    p_pa = np.geomspace(500.0, 2.0e5, 14)
    q = langmuir_eq(p_pa, 4.0, 2e-5)
    lines = ["# units: pressure:Pa,loading:mol/kg",
             "isotherm_id,sorbent_id,adsorbate,temperature_k,pressure,loading"]
    lines += [f"L1,MAT-L,CO2,298.15,{float(p)!r},{float(v)!r}" for p, v in zip(p_pa, q)]
    source = tmp_path / "one.csv"
    source.write_text("\n".join(lines) + "\n")
    out = tmp_path / "L1.svg"
    args = _parser().parse_args(["plot", str(source), "--isotherm", "L1", "--out", str(out)])
    assert args.func(args) == 0
    svg = out.read_bytes()
    assert {"data", "fit-selected", "residuals"} <= set(svg_ids(svg))
    assert "Pressure (kPa)" in svg_texts(svg)
