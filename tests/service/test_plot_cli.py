"""``sorbrank plot`` names an isotherm by sorbent, gas and temperature.

Invented, truth-known Langmuir isotherms of the Tideglass-31 campaign; the
drawing itself is checked in test_plots.py. Which isotherm was drawn is read
from the default file name (the isotherm_id) and from the plotted points.
"""
from __future__ import annotations

import re

import numpy as np
import pytest

from sorbrank.service.cli import main

P_KPA = np.geomspace(1.0, 1000.0, 12)
HEADER = "sorbent_id,adsorbate,temperature_k,branch,pressure_kpa,loading_mmol_per_g"
# (sorbent, gas, T in K, branch, q_sat mmol/g, affinity 1/kPa)
ISOTHERMS = [
    ("TG31-PLOT-0001", "CO2", 298.15, "adsorption", 5.0, 0.02),
    ("TG31-PLOT-0001", "CO2", 273.15, "adsorption", 6.0, 0.05),
    ("TG31-PLOT-0001", "CH4", 298.15, "adsorption", 3.0, 0.004),
    ("TG31-PLOT-0002", "CO2", 298.15, "adsorption", 2.0, 0.01),
    ("TG31-PLOT-0002", "CO2", 298.15, "desorption", 2.1, 0.012),
    # two runs 0.3 K apart: both within the 0.5 K tolerance of 298 K
    ("TG31-PLOT-0003", "N2", 298.15, "adsorption", 1.0, 0.001),
    ("TG31-PLOT-0003", "N2", 298.45, "adsorption", 1.1, 0.001),
]


@pytest.fixture
def screen(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    lines = [HEADER]
    for sorbent, gas, t, branch, q_sat, b in ISOTHERMS:
        q = q_sat * b * P_KPA / (1 + b * P_KPA)
        lines += [f"{sorbent},{gas},{t},{branch},{float(p)!r},{float(v)!r}" for p, v in zip(P_KPA, q)]
    path = tmp_path / "screen.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def plot(capsys, *argv):
    code = main(["plot", *map(str, argv)])
    return code, capsys.readouterr().err


def drawn(path) -> str:
    return path.read_text()


def test_by_sorbent_gas_and_temperature(capsys, screen, tmp_path):
    code, err = plot(capsys, screen, "--sorbent", "TG31-PLOT-0001", "--adsorbate", "CO2",
                     "--temperature-k", "273")
    assert code == 0, err
    (written,) = tmp_path.glob("*_isotherm.svg")
    # the 273.15 K isotherm, 0.15 K from what was typed
    assert "273.15" in written.name and "TG31-PLOT-0001" in written.name
    assert f"wrote {written.name}" in err


def test_the_gas_may_be_given_by_name_and_the_branch_chooses(capsys, screen, tmp_path):
    code, err = plot(capsys, screen, "--sorbent", "TG31-PLOT-0001", "--adsorbate", "methane",
                     "--out", tmp_path / "ch4.svg")
    assert code == 0, err
    code, err = plot(capsys, screen, "--sorbent", "TG31-PLOT-0002", "--branch", "desorption",
                     "--out", tmp_path / "des.svg")
    assert code == 0, err
    assert (tmp_path / "ch4.svg").exists() and (tmp_path / "des.svg").exists()


def test_same_isotherm_as_by_its_id(capsys, screen, tmp_path):
    by_identity, by_id = tmp_path / "a.svg", tmp_path / "b.svg"
    assert plot(capsys, screen, "--sorbent", "TG31-PLOT-0001", "--adsorbate", "CH4",
                "--temperature-k", "298.15", "--out", by_identity)[0] == 0
    from sorbrank.worker.intake import read_batch

    (iso,) = [i for i in read_batch(screen).isotherms
              if (i.sorbent_id, i.adsorbate) == ("TG31-PLOT-0001", "CH4")]
    assert plot(capsys, screen, "--isotherm", iso.isotherm_id, "--out", by_id)[0] == 0
    strip = lambda svg: re.sub(r'(id|href|clip-path)="[^"]*"|<dc:date>[^<]*</dc:date>', "", svg)  # noqa: E731
    assert strip(drawn(by_identity)) == strip(drawn(by_id))


def test_several_matches_are_listed(capsys, screen, tmp_path):
    code, err = plot(capsys, screen, "--sorbent", "TG31-PLOT-0003", "--adsorbate", "N2",
                     "--temperature-k", "298.3", "--out", tmp_path / "x.svg")
    assert code == 2
    assert "2 isotherms match sorbent TG31-PLOT-0003, adsorbate N2, 298.3 K" in err
    assert "TG31-PLOT-0003  N2  298.15 K  adsorption" in err
    assert "TG31-PLOT-0003  N2  298.45 K  adsorption" in err
    assert not (tmp_path / "x.svg").exists()
    code, err = plot(capsys, screen, "--sorbent", "TG31-PLOT-0002", "--out", tmp_path / "x.svg")
    assert code == 2 and "--branch" in err and "desorption" in err


def test_nothing_matching_lists_what_exists(capsys, screen, tmp_path):
    code, err = plot(capsys, screen, "--sorbent", "TG31-PLOT-0001", "--adsorbate", "CO2",
                     "--temperature-k", "310", "--out", tmp_path / "x.svg")
    assert code == 2
    assert "no isotherm matches sorbent TG31-PLOT-0001, adsorbate CO2, 310 K" in err
    assert "isotherms for sorbent TG31-PLOT-0001" in err
    for line in ("CO2  298.15 K", "CO2  273.15 K", "CH4  298.15 K"):
        assert f"TG31-PLOT-0001  {line}" in err
    assert "TG31-PLOT-0002" not in err
    # an unknown sorbent: every isotherm of the input is listed
    code, err = plot(capsys, screen, "--sorbent", "TG31-NOPE", "--out", tmp_path / "x.svg")
    assert code == 2 and "isotherms in the input" in err and "TG31-PLOT-0003" in err
    assert not (tmp_path / "x.svg").exists()


@pytest.mark.parametrize("argv, message", [
    ([], "name the isotherm"),
    (["--isotherm", "x", "--sorbent", "TG31-PLOT-0001"], "--isotherm names the isotherm alone"),
])
def test_naming_errors(capsys, screen, argv, message):
    code, err = plot(capsys, screen, *argv)
    assert code == 2 and message in err


def test_reads_the_input_as_fit_does(capsys, tmp_path):
    # semicolon-delimited, decimal commas, plain columns with the units declared
    q = 4.0 * 0.02 * P_KPA / (1 + 0.02 * P_KPA)
    rows = [f"TG31-EU-0001;CO2;298,15;{float(p)!r};{float(v)!r}".replace(".", ",")
            for p, v in zip(P_KPA, q)]
    path = tmp_path / "export.csv"
    path.write_text("sorbent_id;adsorbate;temperature_k;pressure;loading\n" + "\n".join(rows) + "\n")
    out = tmp_path / "eu.svg"
    code, err = plot(capsys, path, "--sorbent", "TG31-EU-0001", "--units",
                     "pressure:kPa,loading:mmol/g", "--out", out)
    assert code == 0, err
    code, err = plot(capsys, path, "--sorbent", "TG31-EU-0001", "--units",
                     "pressure:kPa,loading:mmol/g", "--delimiter", "comma", "--out", out)
    assert code == 2 and str(path) in err and "';'" in err
