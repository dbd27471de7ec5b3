"""An opt-in model (``in_default_catalogue = False``, e.g. Jovanovic) is left
out of ``models="all"`` and fitted wherever it is named: ``sorbrank fit
--models``, the HTTP ``models=`` parameter and the Python API's ``models=``.

The data are truth-known synthetic Jovanovic isotherms (invented parameters,
noise-free apart from a fixed 0.1 % ripple), so the named model must also win
the selection there.
"""
from __future__ import annotations

import json
import math
import subprocess
import sys

import pytest

import sorbrank
from conftest import TOKENS, tokens_json
from sorbrank.service.app import create_app
from sorbrank.service.auth import parse_tokens
from sorbrank.service.config import Settings
from sorbrank.worker import jobs
from sorbrank.worker.engine import resolve_models
from sorbrank.worker.models import CATALOGUE, default_models
from sorbrank.worker.pipeline import FitOptions
from sorbrank.worker.store import Store

OPT_IN = [m.id for m in CATALOGUE.values() if not m.in_default_catalogue]
DEFAULT = [m.id for m in default_models()]
# (sorbent, q_sat mol/kg, affinity 1/Pa), invented
TRUTHS = (("J1", 3.0, 2e-5), ("J2", 6.0, 5e-5))


def jovanovic_csv() -> bytes:
    # Jovanovic, Kolloid-Z. Z. Polym. 235 (1969) 1203: q = q_sat (1 - e^-bp)
    lines = ["sorbent_id,adsorbate,temperature_k,pressure_pa,loading_mol_per_kg"]
    for sorbent, q_sat, b in TRUTHS:
        for i in range(20):
            p = 1e3 * 10 ** (2.5 * i / 19)
            ripple = 1.0 + 1e-3 * math.sin(3.0 * i)
            lines.append(f"{sorbent},CO2,298.15,{p!r},{q_sat * -math.expm1(-b * p) * ripple!r}")
    return ("\n".join(lines) + "\n").encode()


def test_jovanovic_is_opt_in_and_the_default_set_is_the_rest_in_order():
    assert OPT_IN == ["jovanovic"]
    assert DEFAULT == [m for m in CATALOGUE if m not in OPT_IN]
    assert [m.id for m in resolve_models("all")] == DEFAULT
    assert FitOptions().model_ids == DEFAULT


@pytest.mark.parametrize("models", ["all,jovanovic", ["all", "jovanovic"],
                                    "jovanovic,all,jovanovic"])
def test_all_in_a_list_is_the_default_set_and_a_name_adds_an_opt_in_model(models):
    ids = FitOptions(models=models).model_ids
    assert sorted(ids) == sorted(DEFAULT + ["jovanovic"]) and len(ids) == len(set(ids))
    assert FitOptions(models="jovanovic").model_ids == ["jovanovic"]


def _fit_cli(path, *extra) -> dict:
    run = subprocess.run([sys.executable, "-m", "sorbrank.service.cli", "fit", str(path),
                          "--format", "json", *extra], capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    return json.loads(run.stdout)


def test_sorbrank_fit_leaves_it_out_by_default_and_fits_it_when_named(tmp_path):
    path = tmp_path / "jovanovic.csv"
    path.write_bytes(jovanovic_csv())
    default = _fit_cli(path)
    assert default["options"]["models"] == DEFAULT
    assert "jovanovic" not in json.dumps(default)
    named = _fit_cli(path, "--models", "all,jovanovic")
    assert named["options"]["models"] == DEFAULT + ["jovanovic"]
    assert [iso["best_model"] for iso in named["isotherms"]] == ["jovanovic"] * len(TRUTHS)


def test_the_python_api_fits_it_when_named():
    results = sorbrank.fit(jovanovic_csv(), models="all,jovanovic")
    summary = results.summary.sort_values("sorbent_id")
    assert list(summary["best_model"]) == ["jovanovic"] * len(TRUTHS)
    for (_, q_sat, _), got in zip(TRUTHS, summary["q_sat_mol_per_kg"]):
        assert got == pytest.approx(q_sat, rel=1e-2)
    assert "jovanovic" not in set(sorbrank.fit(jovanovic_csv()).fits["model"])


def test_the_http_api_fits_it_when_named_in_the_models_parameter(tmp_path):
    settings = Settings(data_dir=tmp_path / "data", chunk_size=2, embedded_workers=1,
                        tokens=tuple(parse_tokens(tokens_json(), "test")))
    store = Store(settings.data_dir)
    # chunks run inline through the real job code, so results exist after the 202
    app = create_app(settings, enqueue=lambda batch_id, chunk: jobs.execute_chunk(store, batch_id, chunk))
    client = app.test_client()
    headers = {"Content-Type": "text/csv", "Authorization": f"Bearer {TOKENS['submitter'][0]}"}
    for query, fitted in (({}, set(DEFAULT)),
                          ({"models": "all,jovanovic"}, set(DEFAULT) | {"jovanovic"})):
        resp = client.post("/api/v1/batches", data=jovanovic_csv(), headers=headers,
                           query_string=query)
        assert resp.status_code == 202, resp.get_json()
        results = client.get(f"{resp.json['status_url']}/results", headers=headers).json
        assert {r["model"] for r in results["fits"]} == fitted
    assert {r["best_model"] for r in results["summary"]} == {"jovanovic"}
