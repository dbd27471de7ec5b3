"""The plot endpoints, and the HTML pages under bearer tokens, against a real
``sorbrank serve`` (embedded mode) over loopback HTTP.

Two small batches are posted once: CO2 on two invented sorbents at three
temperatures (so an isosteric heat exists) plus N2 at 298 K, and the first two
N2 77 K isotherms of the sample campaign (so a BET range exists). Every plot
is then checked against what the store holds for the same isotherm.
"""
from __future__ import annotations

import io
import math
import struct
import xml.etree.ElementTree as ET

import pytest

from conftest import ROOT, isotherm, json_batch, wait_until

pytestmark = [pytest.mark.integration,
              # the plots do not depend on the mode; embedded needs no redis
              pytest.mark.parametrize("service", ["embedded"], indirect=True)]

R_J_PER_MOL_K = 8.314462618
SVG_NS = "{http://www.w3.org/2000/svg}"
XLINK_HREF = "{http://www.w3.org/1999/xlink}href"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
# figure size (inches) x the PNG dpi of service/plots.py
ISOTHERM_PNG_PX = (768, 672)


def gas_batch() -> bytes:
    """CO2 with an affinity following b(T) = b(298 K) exp(Q/R (1/T - 1/298 K))."""
    isotherms = []
    for sorbent, q_sat, b298_per_kpa, heat_j_per_mol in (("PLOT-A", 5.0, 0.08, 30_000.0),
                                                          ("PLOT-B", 3.0, 0.02, 22_000.0)):
        for t_k in (273.15, 298.15, 323.15):
            b = b298_per_kpa * math.exp(heat_j_per_mol / R_J_PER_MOL_K * (1 / t_k - 1 / 298.15))
            isotherms.append(isotherm(sorbent, q_sat, b, temperature_k=t_k))
        isotherms.append(isotherm(sorbent, 0.6 * q_sat, b298_per_kpa / 20, adsorbate="N2"))
    return json_batch(isotherms, label="plot-gas")


def n2_77k_batch(count: int = 2) -> bytes:
    """The header and the first ``count`` isotherms of the sample N2 77 K batch."""
    lines = (ROOT / "sample_batches" / "b06_n2_77k_relative.csv").read_text().splitlines()
    head = [ln for ln in lines if ln.startswith("#")]
    columns = next(ln for ln in lines if not ln.startswith("#"))
    rows = lines[lines.index(columns) + 1:]
    wanted = list(dict.fromkeys(r.split(",", 1)[0] for r in rows))[:count]
    kept = [r for r in rows if r.split(",", 1)[0] in wanted]
    return ("\n".join(head + [columns] + kept) + "\n").encode()


def post_and_wait(service, body: bytes, content_type: str) -> str:
    http = service.session("submitter")
    resp = http.post(service.api + "/batches", data=body,
                     headers={"Content-Type": content_type}, timeout=30)
    assert resp.status_code == 202, resp.text
    batch_id = resp.json()["batch_id"]

    def finished():
        state = http.get(f"{service.api}/batches/{batch_id}", timeout=10).json()["state"]
        return state if state in ("done", "failed", "partial") else None

    assert wait_until(finished, f"batch {batch_id} to finish", service.procs) == "done"
    return batch_id


@pytest.fixture(scope="module")
def stored(service):
    """Summary rows of both batches by isotherm id, plus the reader session."""
    batch_ids = [post_and_wait(service, gas_batch(), "application/json"),
                 post_and_wait(service, n2_77k_batch(), "text/csv")]
    reader = service.session("reader")
    summaries = {}
    for batch_id in batch_ids:
        doc = reader.get(f"{service.api}/batches/{batch_id}/results?table=summary",
                         timeout=30).json()
        summaries.update({row["isotherm_id"]: row for row in doc["summary"]})
    return {"batch_ids": batch_ids, "summaries": summaries, "reader": reader}


def pick(stored, **match) -> dict:
    return next(row for row in stored["summaries"].values()
                if all(row[k] == v for k, v in match.items()))


def plot_url(service, isotherm_id: str) -> str:
    # ids contain '|'; requests percent-encodes it and Flask decodes it back
    return f"{service.api}/isotherms/{isotherm_id}/plot"


def svg_of(resp) -> ET.Element:
    assert resp.status_code == 200, resp.text
    assert resp.headers["Content-Type"].startswith("image/svg+xml")
    return ET.fromstring(resp.content)  # raises unless the SVG is well-formed XML


def groups(svg: ET.Element) -> dict[str, ET.Element]:
    return {el.get("id"): el for el in svg.iter() if el.get("id")}


def text_of(svg: ET.Element) -> str:
    return " ".join("".join(t.itertext()) for t in svg.iter(SVG_NS + "text"))


def marker_count(group: ET.Element) -> int:
    """Markers matplotlib drew in a series group (one <use> per point)."""
    return sum(1 for el in group.iter(SVG_NS + "use") if el.get(XLINK_HREF))


def assert_problem(resp, status: int) -> dict:
    assert resp.status_code == status, resp.text
    assert resp.headers["Content-Type"].startswith("application/problem+json")
    doc = resp.json()
    assert doc["status"] == status and doc["title"]
    return doc


# -- isotherm plots ---------------------------------------------------------------

def test_isotherm_svg_draws_the_stored_points_and_selected_fit(service, stored):
    from sorbrank.worker.models import CATALOGUE

    row = pick(stored, sorbent_id="PLOT-A", adsorbate="CO2", temperature_k=298.15)
    svg = svg_of(stored["reader"].get(plot_url(service, row["isotherm_id"]), timeout=60))
    found = groups(svg)
    for gid in ("data", "fit-selected", "fit-runner-up", "residuals", "residuals-zero"):
        assert gid in found, f"series {gid!r} missing; ids: {sorted(found)}"
    # one marker per stored point, in the data and in the residual panel
    assert marker_count(found["data"]) == row["n_points"] == 9
    assert marker_count(found["residuals"]) == row["n_points"]
    text = text_of(svg)
    assert f"{CATALOGUE[row['best_model']].title} (selected)" in text
    assert "PLOT-A" in text and "Pressure (kPa)" in text


def test_log_pressure_changes_the_axis_not_the_series(service, stored):
    row = pick(stored, sorbent_id="PLOT-B", adsorbate="CO2", temperature_k=273.15)
    url = plot_url(service, row["isotherm_id"])
    linear = stored["reader"].get(url, timeout=60)
    logarithmic = stored["reader"].get(url, params={"log_pressure": "true"}, timeout=60)
    svg = svg_of(logarithmic)
    assert {"data", "fit-selected", "residuals"} <= set(groups(svg))
    assert marker_count(groups(svg)["data"]) == row["n_points"]
    assert logarithmic.content != linear.content


def test_langmuir_linear_svg(service, stored):
    row = pick(stored, sorbent_id="PLOT-A", adsorbate="CO2", temperature_k=273.15)
    svg = svg_of(stored["reader"].get(plot_url(service, row["isotherm_id"]),
                                      params={"kind": "langmuir-linear"}, timeout=60))
    found = groups(svg)
    assert {"langmuir-data", "langmuir-line", "langmuir-equation"} <= set(found)
    assert marker_count(found["langmuir-data"]) == row["n_points"]
    # noise-free Langmuir data: the double-reciprocal estimate is the true q_sat
    assert "q_sat = 5 mol/kg" in text_of(svg)


def test_bet_svg_shows_the_stored_range_and_area(service, stored):
    row = pick(stored, adsorbate="N2", temperature_k=77.35)
    assert row["bet_area_m2_per_g"] is not None
    svg = svg_of(stored["reader"].get(plot_url(service, row["isotherm_id"]),
                                      params={"kind": "bet", "batch_id": row["batch_id"]},
                                      timeout=60))
    found = groups(svg)
    assert {"bet-range", "bet-fit", "bet-data-in-range", "bet-annotation"} <= set(found)
    in_range = marker_count(found["bet-data-in-range"])
    assert in_range == round(row["bet_n_points"])
    assert f"BET area = {row['bet_area_m2_per_g']:.4g} m2/g" in text_of(svg)


def test_isotherm_png_is_a_real_image(service, stored):
    from PIL import Image

    row = pick(stored, sorbent_id="PLOT-A", adsorbate="CO2", temperature_k=323.15)
    resp = stored["reader"].get(plot_url(service, row["isotherm_id"]),
                                params={"format": "png"}, timeout=60)
    assert resp.status_code == 200 and resp.headers["Content-Type"] == "image/png"
    body = resp.content
    assert body[:8] == PNG_SIGNATURE
    width, height = struct.unpack(">II", body[16:24])  # the IHDR chunk
    assert (width, height) == ISOTHERM_PNG_PX
    image = Image.open(io.BytesIO(body)).convert("L")
    histogram = image.histogram()
    dark_pixels = sum(histogram[:128])  # axes, text, points and curves
    assert dark_pixels > 0.005 * width * height
    assert len([n for n in histogram if n]) > 16  # anti-aliased drawing, not a flat fill


# -- isosteric heat ----------------------------------------------------------------

def test_qst_svg_for_a_gas_at_three_temperatures(service, stored):
    resp = stored["reader"].get(f"{service.api}/sorbents/PLOT-A/qst-plot",
                                params={"adsorbate": "CO2"}, timeout=60)
    found = groups(svg_of(resp))
    assert {"qst-0", "qst-0-errorbars"} <= set(found)
    assert "qst-1" not in found  # one gas asked for, one curve drawn
    # the gas name in the form intake stores it, as the rankings match it
    for name in ("co2", "carbon dioxide"):
        same = stored["reader"].get(f"{service.api}/sorbents/PLOT-A/qst-plot",
                                    params={"adsorbate": name}, timeout=60)
        assert set(groups(svg_of(same))) == set(found)
    doc = assert_problem(stored["reader"].get(f"{service.api}/sorbents/PLOT-A/qst-plot",
                                              params={"adsorbate": "C02"}, timeout=10), 400)
    assert doc["adsorbate"] == "C02" and "CO2" in doc["suggestions"]
    png = stored["reader"].get(f"{service.api}/sorbents/PLOT-A/qst-plot",
                               params={"format": "png"}, timeout=60)
    assert png.status_code == 200 and png.content[:8] == PNG_SIGNATURE


# -- errors ------------------------------------------------------------------------

def test_unknown_things_are_404(service, stored):
    reader = stored["reader"]
    row = pick(stored, sorbent_id="PLOT-A", adsorbate="CO2", temperature_k=298.15)
    doc = assert_problem(reader.get(plot_url(service, "no-such-isotherm"), timeout=10), 404)
    assert "no-such-isotherm" in doc["detail"]
    # a well-formed batch id that holds no such isotherm
    other_batch = stored["batch_ids"][1]
    assert_problem(reader.get(plot_url(service, row["isotherm_id"]),
                              params={"batch_id": other_batch}, timeout=10), 404)
    assert_problem(reader.get(f"{service.api}/sorbents/NO-SUCH/qst-plot", timeout=10), 404)
    # N2 was measured at one temperature only: no isosteric heat
    assert_problem(reader.get(f"{service.api}/sorbents/PLOT-A/qst-plot",
                              params={"adsorbate": "N2"}, timeout=10), 404)


@pytest.mark.parametrize("params", [{"kind": "contour"}, {"format": "gif"},
                                    {"format": ""}, {"log_pressure": "sometimes"},
                                    {"batch_id": "../../etc"}])
def test_bad_parameters_are_400(service, stored, params):
    row = pick(stored, sorbent_id="PLOT-A", adsorbate="CO2", temperature_k=298.15)
    doc = assert_problem(stored["reader"].get(plot_url(service, row["isotherm_id"]),
                                              params=params, timeout=10), 400)
    assert doc["parameter"] == next(iter(params))


def test_bad_qst_format_is_400(service, stored):
    assert_problem(stored["reader"].get(f"{service.api}/sorbents/PLOT-A/qst-plot",
                                        params={"format": "jpeg"}, timeout=10), 400)


def test_bet_without_saturation_pressure_is_422(service, stored):
    row = pick(stored, sorbent_id="PLOT-B", adsorbate="N2", temperature_k=298.15)
    doc = assert_problem(stored["reader"].get(plot_url(service, row["isotherm_id"]),
                                              params={"kind": "bet"}, timeout=10), 422)
    assert "saturation pressure" in doc["detail"]


def test_plots_need_the_read_scope(service, stored):
    import requests

    row = pick(stored, sorbent_id="PLOT-A", adsorbate="CO2", temperature_k=298.15)
    assert_problem(requests.get(plot_url(service, row["isotherm_id"]), timeout=10), 401)
    assert_problem(requests.get(f"{service.api}/sorbents/PLOT-A/qst-plot", timeout=10), 401)


# -- the HTML pages when tokens are configured --------------------------------------

def test_pages_answer_401_as_html_without_a_token(service, stored):
    import requests

    resp = requests.get(service.url + "/", timeout=10)
    assert resp.status_code == 401
    assert resp.headers["Content-Type"].startswith("text/html")
    assert resp.headers["WWW-Authenticate"].startswith("Bearer")
    assert "Authorization: Bearer" in resp.text


def test_pages_with_a_read_token(service, stored):
    reader = stored["reader"]
    page = reader.get(service.url + "/", params={"adsorbate": "CO2"}, timeout=30)
    assert page.status_code == 200 and page.headers["Content-Type"].startswith("text/html")
    assert "PLOT-A" in page.text and "PLOT-B" in page.text
    assert "TG31-" not in page.text  # the N2 77 K rows are filtered out
    sorbent = reader.get(service.url + "/sorbents/PLOT-A", timeout=30)
    assert sorbent.status_code == 200
    assert "qst-plot" in sorbent.text and "/plot?" in sorbent.text
    for path, status in (("/sorbents/NO-SUCH", 404), ("/?temperature_k=warm", 400),
                         ("/?sort=colour", 400), ("/?order=sideways", 400),
                         ("/?offset=-3", 400)):
        resp = reader.get(service.url + path, timeout=30)
        assert resp.status_code == status, path
        assert resp.headers["Content-Type"].startswith("text/html"), path
        assert "Back to the rankings" in resp.text
