"""``sorbrank fit`` and the pipeline behind it (serial and parallel paths).

Data here are invented, truth-known Langmuir isotherms (the science is
checked in test_engine, test_selection and test_nist_misra1d); these tests
check the command's contract: formats, ranking, exit codes, rejected input on
stderr, valid JSON, and that the parallel run equals the serial one.
"""
from __future__ import annotations

import csv
import io
import json
import math

import numpy as np
import pyarrow.csv as pcsv
import pyarrow.parquet as pq
import pytest

from sorbrank.service.cli import main
from sorbrank.worker.isotherm import Batch, Isotherm
from sorbrank.worker.models import CATALOGUE
from sorbrank.worker.pipeline import FitOptions, process_batch, process_isotherms_parallel

P_PA = np.geomspace(1e2, 1e6, 15)
HEADER = ["isotherm_id", "sorbent_id", "adsorbate", "temperature_k", "pressure", "loading",
          "pressure_unit", "loading_unit"]
# (q_sat mol/kg, affinity 1/Pa) per isotherm: q_sat order is the expected ranking
TRUTHS = [(2.0, 1e-5), (6.0, 3e-5), (4.0, 1e-4)]


def langmuir_rows(iso_id, sorbent, q_sat, b, seed):
    rng = np.random.default_rng(seed)
    q = q_sat * b * P_PA / (1 + b * P_PA) * (1 + 0.003 * rng.standard_normal(P_PA.size))
    return [[iso_id, sorbent, "CO2", "298.15", f"{p:.9g}", f"{v:.9g}", "Pa", "mol/kg"]
            for p, v in zip(P_PA, q)]


@pytest.fixture
def screen_csv(tmp_path):
    path = tmp_path / "screen.csv"
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(HEADER)
        for i, (q_sat, b) in enumerate(TRUTHS):
            w.writerows(langmuir_rows(f"iso{i}", f"MAT-{i}", q_sat, b, seed=i))
        w.writerow(["broken", "MAT-X", "CO2", "298.15", "not-a-number", "1.0", "Pa", "mol/kg"])
    return path


def run_cli(capsys, *argv):
    code = main(["fit", *map(str, argv)])
    out, err = capsys.readouterr()
    return code, out, err


def test_help_teaches_every_option(capsys):
    with pytest.raises(SystemExit) as stop:
        main(["fit", "--help"])
    assert stop.value.code == 0
    text = capsys.readouterr().out
    for word in ("--models", "--criterion", "--weighting", "--format", "--out", "--sort", "--top",
                 "--fits", "mol/kg", "examples:", "exit status"):
        assert word in text


def test_table_is_ranked_by_capacity_and_rejections_go_to_stderr(capsys, screen_csv):
    code, out, err = run_cli(capsys, screen_csv)
    assert code == 0
    assert "broken" in err and "not a number" in err
    lines = out.strip().splitlines()
    assert lines[0].split()[:3] == ["#", "sorbent", "gas"]
    sorbents = [line.split()[1] for line in lines[2:]]
    assert sorbents == ["MAT-1", "MAT-2", "MAT-0"]  # q_sat 6 > 4 > 2


def test_json_follows_the_contract_and_is_valid_json(capsys, screen_csv):
    code, out, _ = run_cli(capsys, screen_csv, "--format", "json", "--models", "langmuir,sips,bet")

    def no_nan(token):
        raise AssertionError(f"{token} in JSON output")

    doc = json.loads(out, parse_constant=no_nan)
    assert code == 0
    assert set(doc) >= {"isotherms", "rejected", "sorbents"}
    assert [r["isotherm"] for r in doc["rejected"]] == ["broken"]
    rec = doc["isotherms"][0]
    assert rec["isotherm_id"] == "iso1" and rec["temperature_k"] == 298.15 and rec["n_points"] == 15
    for key in ("sorbent_id", "adsorbate", "best_model", "ambiguous", "flags", "fits",
                "linearized_langmuir", "summary"):
        assert key in rec
    fits = {f["model"]: f for f in rec["fits"]}
    assert set(fits) == {"langmuir", "sips", "bet"}
    lang = fits["langmuir"]
    for key in ("converged", "reason", "params", "stderr", "ci95", "sse", "rmse", "r2", "aic",
                "aicc", "bic", "akaike_weight", "n_params", "at_bound"):
        assert key in lang
    assert lang["converged"] and lang["params"]["q_sat"] == pytest.approx(6.0, rel=0.02)
    lo, hi = lang["ci95"]["q_sat"]
    assert lo < lang["params"]["q_sat"] < hi
    # CO2 at 298.15 K is below its critical point, but these data do not
    # reach p0: BET either applies or says why not -- never silently absent
    assert isinstance(fits["bet"]["reason"], str) and fits["bet"]["reason"]
    weights = [f["akaike_weight"] for f in rec["fits"] if f["akaike_weight"] is not None]
    assert math.isclose(sum(weights), 1.0, rel_tol=1e-12)


def test_csv_parquet_and_fit_tables(capsys, screen_csv, tmp_path):
    code, out, _ = run_cli(capsys, screen_csv, "--format", "csv", "--top", "2")
    table = pcsv.read_csv(io.BytesIO(out.encode()))
    assert code == 0 and table.column("isotherm_id").to_pylist() == ["iso1", "iso2"]
    assert "q_sat_mol_per_kg" in table.column_names

    target = tmp_path / "fits.parquet"
    code, _, _ = run_cli(capsys, screen_csv, "--format", "parquet", "--fits", "--out", target,
                         "--models", "langmuir,henry")
    fits = pq.read_table(target)
    assert code == 0 and fits.num_rows == 3 * 2
    assert {"model", "param_q_sat", "stderr_q_sat", "param_k_h", "at_bound_q_sat"} <= set(fits.column_names)
    rows = fits.to_pylist()
    henry_row = next(r for r in rows if r["model"] == "henry")
    assert henry_row["param_q_sat"] is None and henry_row["param_k_h"] > 0


def test_sort_by_another_column_ascending(capsys, screen_csv):
    code, out, _ = run_cli(capsys, screen_csv, "--format", "csv", "--sort", "sorbent_id")
    ids = pcsv.read_csv(io.BytesIO(out.encode())).column("sorbent_id").to_pylist()
    assert code == 0 and ids == sorted(ids)


@pytest.mark.parametrize("argv", [
    ["--models", "no_such_model"],
    ["--sort", "no_such_column"],
    ["--format", "parquet"],            # parquet needs --out
    ["--fits"],                         # --fits needs csv or parquet
])
def test_usage_errors_exit_2(capsys, screen_csv, argv):
    code, _, err = run_cli(capsys, screen_csv, *argv)
    assert code == 2 and "error" in err


def test_missing_file_and_unknown_option_exit_2(capsys, tmp_path):
    assert run_cli(capsys, tmp_path / "absent.csv")[0] == 2
    with pytest.raises(SystemExit) as stop:
        main(["fit", "x.csv", "--criterion", "hqic"])
    assert stop.value.code == 2


def test_nothing_acceptable_exits_1(capsys, tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text(",".join(HEADER) + "\n" + "a,M,CO2,298.15,x,1,Pa,mol/kg\n")
    code, _, err = run_cli(capsys, path)
    assert code == 1 and "rejected" in err


def _batch(n, seed=0):
    rng = np.random.default_rng(seed)
    isos = []
    for i in range(n):
        q_sat, b = rng.uniform(1, 8), 10 ** rng.uniform(-6, -3)
        p = P_PA[: 8 + i % 8]  # unequal lengths
        q = q_sat * b * p / (1 + b * p) + 0.01 * rng.standard_normal(p.size)
        isos.append(Isotherm(f"i{i}", f"m{i % 5}", "CO2", 298.15, p, q,
                             saturation_pressure_pa=6.4e6 if i % 2 else None))
    return Batch("b", isos)


def test_parallel_chunks_equal_the_serial_run():
    batch = _batch(40)
    options = FitOptions(models=["henry", "langmuir", "sips", "bet"])
    serial = process_batch(batch, options)
    parallel = process_isotherms_parallel(batch, options, workers=2, chunk_size=7)
    assert json.dumps(serial.to_json(), allow_nan=False) == json.dumps(parallel.to_json(), allow_nan=False)
    assert serial.fits_table().equals(parallel.fits_table())
    assert serial.summary_table().equals(parallel.summary_table())


def test_result_tables_have_one_row_per_isotherm_and_per_fit():
    batch = _batch(6)
    result = process_batch(batch, FitOptions(models="all"))
    assert result.summary_table().num_rows == 6
    fits = result.fits_table()
    assert fits.num_rows == 6 * len(CATALOGUE)
    assert set(fits.column("model").to_pylist()) == set(CATALOGUE)
    # exactly one selected row per isotherm that has a best model
    selected = [r["isotherm_id"] for r in fits.to_pylist() if r["selected"]]
    assert sorted(selected) == sorted(i for i, b in zip(result.packed.isotherm_ids, result.selection.best)
                                      if b is not None)


def test_fit_options_refuse_unknown_values():
    for bad in ({"models": ["nope"]}, {"criterion": "hqic"}, {"weighting": "huber"}):
        with pytest.raises(ValueError):
            FitOptions(**bad)


def test_empty_batch_gives_empty_results():
    result = process_batch(Batch("empty", []))
    assert result.summary_table().num_rows == 0 and result.to_json()["isotherms"] == []


def test_json_summary_carries_the_metric_contract(tmp_path):
    # issue contract: each isotherm's "summary" holds these names, null where a
    # figure does not apply; the BET range is [low, high] in p/p0
    import subprocess
    import sys
    from pathlib import Path

    sample = Path(__file__).resolve().parents[1] / "sample_batches" / "b06_n2_77k_relative.csv"
    out = subprocess.run([sys.executable, "-m", "sorbrank.service.cli", "fit", str(sample), "--format", "json",
                          "--workers", "1"], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    records = json.loads(out.stdout)["isotherms"]
    contract = ("q_sat_mol_per_kg", "monolayer_volume_cm3stp_per_g", "sites_per_g",
                "henry_mol_per_kg_pa", "bet_area_m2_per_g", "bet_c",
                "bet_range_relative_pressure", "flags")
    with_range = 0
    for rec in records:
        summary = rec["summary"]
        assert all(name in summary for name in contract)
        rng = summary["bet_range_relative_pressure"]
        if rng is not None:
            with_range += 1
            assert 0 < rng[0] < rng[1] < 1 and summary["bet_area_m2_per_g"] > 0
        else:
            assert summary["bet_area_m2_per_g"] is None and "bet_no_valid_range" in summary["flags"]
    assert with_range >= 0.9 * len(records)
