"""NIST StRD nonlinear regression dataset Misra1d against its certified values.

Source: NIST/ITL StRD nonlinear regression dataset Misra1d (certified
values) (Misra, D., NIST 1978, dental research monomolecular adsorption
study); data and certified values are typed below. Model y = b1*b2*x/(1+b2*x)
is the Langmuir form: b1 = q_sat, b2 = affinity. NIST's accuracy measure is
the log relative error LRE = -log10(|computed - certified| / |certified|).

Acceptance: parameters LRE >= 9, their standard deviations LRE >= 4, the
residual sum of squares LRE >= 6 -- through the Python API and through the
``sorbrank fit`` command on a CSV file.
"""
from __future__ import annotations

import csv
import json
import subprocess
import sys
from pathlib import Path

import numpy as np

from sorbrank.worker.engine import fit_model
from sorbrank.worker.isotherm import Isotherm
from sorbrank.worker.models import CATALOGUE
from sorbrank.worker.packing import pack

REPO = Path(__file__).resolve().parents[2]

# NIST StRD Misra1d: x = pressure, y = volume adsorbed (14 observations)
X = np.array([77.6, 114.9, 141.1, 190.8, 239.9, 289.0, 332.8, 378.4, 434.8, 477.3,
              536.8, 593.1, 689.1, 760.0])
Y = np.array([10.07, 14.73, 17.94, 23.93, 29.61, 35.18, 40.02, 44.82, 50.76, 55.05,
              61.01, 66.40, 75.47, 81.78])
# NIST StRD Misra1d certified values
B_CERT = np.array([4.3736970754e02, 3.0227324449e-04])
SD_CERT = np.array([3.6489174345e00, 2.9334354479e-06])
RSS_CERT = 5.6419295283e-02
RSD_CERT = 6.8568272111e-02  # residual standard deviation, 12 degrees of freedom


def lre(computed, certified):
    computed, certified = np.asarray(computed, float), np.asarray(certified, float)
    with np.errstate(divide="ignore"):
        return -np.log10(np.abs(computed - certified) / np.abs(certified))


def check_against_certified(params, stderr, sse):
    assert np.all(lre(params, B_CERT) >= 9), lre(params, B_CERT)
    assert np.all(lre(stderr, SD_CERT) >= 4), lre(stderr, SD_CERT)
    assert lre(sse, RSS_CERT) >= 6, lre(sse, RSS_CERT)


def test_misra1d_through_the_python_api():
    iso = Isotherm("misra1d", "dental", "unknown", 298.15, X, Y)
    fits = fit_model(CATALOGUE["langmuir"], pack([iso]))
    assert fits.converged[0], fits.reason[0]
    check_against_certified(fits.params[0], fits.stderr[0], fits.sse[0])
    assert lre(np.sqrt(fits.sse[0] / (14 - 2)), RSD_CERT) >= 6


def test_misra1d_in_a_batch_of_strangers_is_unchanged():
    # the same data fitted among other isotherms (other lengths, scales) and
    # in the middle of the batch: per-row results must not depend on company
    others = [Isotherm(f"o{i}", "m", "CO2", 300.0, np.geomspace(1e3, 1e6, 5 + 7 * i),
                       5.0 * 1e-5 * np.geomspace(1e3, 1e6, 5 + 7 * i)
                       / (1 + 1e-5 * np.geomspace(1e3, 1e6, 5 + 7 * i)) * (1 + 0.01 * i))
              for i in range(4)]
    iso = Isotherm("misra1d", "dental", "unknown", 298.15, X, Y)
    fits = fit_model(CATALOGUE["langmuir"], pack(others[:2] + [iso] + others[2:]))
    check_against_certified(fits.params[2], fits.stderr[2], fits.sse[2])


def test_misra1d_through_the_command_line(tmp_path):
    path = tmp_path / "misra1d.csv"
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["isotherm_id", "sorbent_id", "adsorbate", "temperature_k",
                    "pressure_pa", "loading_mol_per_kg"])
        for x, y in zip(X, Y):
            # float repr round-trips: the file holds exactly the NIST values
            w.writerow(["misra1d", "dental", "N2", "298.15", repr(float(x)), repr(float(y))])
    run = subprocess.run(
        [sys.executable, "-m", "sorbrank.service.cli", "fit", str(path), "--models", "langmuir",
         "--format", "json"],
        capture_output=True, text=True, cwd=REPO, timeout=300)
    assert run.returncode == 0, run.stderr
    doc = json.loads(run.stdout)
    (record,) = doc["isotherms"]
    (fit,) = [f for f in record["fits"] if f["model"] == "langmuir"]
    assert fit["converged"], fit["reason"]
    params = [fit["params"]["q_sat"], fit["params"]["affinity"]]
    stderr = [fit["stderr"]["q_sat"], fit["stderr"]["affinity"]]
    check_against_certified(params, stderr, fit["sse"])
