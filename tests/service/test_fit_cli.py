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
HEADER = ["isotherm_id", "sorbent_id", "adsorbate", "temperature_k", "pressure_pa",
          "loading_mol_per_kg"]
# (q_sat mol/kg, affinity 1/Pa) per isotherm: q_sat order is the expected ranking
TRUTHS = [(2.0, 1e-5), (6.0, 3e-5), (4.0, 1e-4)]


def langmuir_rows(iso_id, sorbent, q_sat, b, seed):
    rng = np.random.default_rng(seed)
    q = q_sat * b * P_PA / (1 + b * P_PA) * (1 + 0.003 * rng.standard_normal(P_PA.size))
    return [[iso_id, sorbent, "CO2", "298.15", f"{p:.9g}", f"{v:.9g}"]
            for p, v in zip(P_PA, q)]


@pytest.fixture
def screen_csv(tmp_path):
    path = tmp_path / "screen.csv"
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(HEADER)
        for i, (q_sat, b) in enumerate(TRUTHS):
            w.writerows(langmuir_rows(f"iso{i}", f"MAT-{i}", q_sat, b, seed=i))
        w.writerow(["broken", "MAT-X", "CO2", "298.15", "not-a-number", "1.0"])
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
    for key in ("sorbent_id", "adsorbate", "best_model", "ambiguous", "quality_flags", "fits",
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
    path.write_text(",".join(HEADER) + "\n" + "a,M,CO2,298.15,x,1\n")
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
    # "all" is the default set: opt-in models (in_default_catalogue = False) are left out
    default = [m.id for m in CATALOGUE.values() if m.in_default_catalogue]
    assert fits.num_rows == 6 * len(default)
    assert set(fits.column("model").to_pylist()) == set(default)
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

    sample = Path(__file__).resolve().parents[2] / "sample_batches" / "b06_n2_77k_relative.csv"
    out = subprocess.run([sys.executable, "-m", "sorbrank.service.cli", "fit", str(sample), "--format", "json",
                          "--workers", "1"], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    records = json.loads(out.stdout)["isotherms"]
    contract = ("q_sat_mol_per_kg", "monolayer_volume_cm3stp_per_g", "sites_per_g",
                "henry_mol_per_kg_pa", "bet_area_m2_per_g", "bet_c",
                "bet_range_relative_pressure", "quality_flags")
    with_range = 0
    for rec in records:
        summary = rec["summary"]
        assert all(name in summary for name in contract)
        rng = summary["bet_range_relative_pressure"]
        if rng is not None:
            with_range += 1
            assert 0 < rng[0] < rng[1] < 1 and summary["bet_area_m2_per_g"] > 0
        else:
            assert summary["bet_area_m2_per_g"] is None and "bet_no_valid_range" in summary["quality_flags"]
    assert with_range >= 0.9 * len(records)


# ---------------------------------------------------------------------------
# reading options: one units declaration, sample mass, delimiters, gases

# an invented Tideglass-31 CO2 isotherm at 298.15 K in kPa and mmol/g
KPA = [5.0, 10.0, 20.0, 40.0, 60.0, 80.0, 100.0, 150.0]
MMOL_PER_G = [0.31, 0.58, 1.02, 1.66, 2.12, 2.45, 2.71, 3.12]


def _points_file(path, header, rows, delimiter=",", preamble=""):
    lines = [delimiter.join(header)] + [delimiter.join(map(str, r)) for r in rows]
    path.write_text(preamble + "\n".join(lines) + "\n")
    return path


def _summary(capsys, *argv):
    code, out, err = run_cli(capsys, *argv, "--format", "csv", "--workers", "1")
    assert code == 0, err
    return pcsv.read_csv(io.BytesIO(out.encode())).to_pylist()


NUMBERS = ("temperature_k", "n_points", "q_sat_mol_per_kg", "q_sat_ci95_low_mol_per_kg",
           "henry_mol_per_kg_pa", "working_capacity_mol_per_kg", "loading_ads_mol_per_kg")


def _assert_same_numbers(rows, expected):
    assert len(rows) == len(expected) == 1
    for name in NUMBERS:
        assert rows[0][name] == pytest.approx(expected[0][name], rel=1e-9), name
    assert rows[0]["best_model"] == expected[0]["best_model"]


def test_units_options_give_the_numbers_of_unit_carrying_columns(capsys, tmp_path):
    ident = ["TG31-UNIT-0001", "CO2", "298.15"]
    carrying = _points_file(tmp_path / "carrying.csv",
                            ["sorbent_id", "adsorbate", "temperature_k", "pressure_kpa",
                             "loading_mmol_per_g"], [ident + [p, q] for p, q in zip(KPA, MMOL_PER_G)])
    plain = _points_file(tmp_path / "plain.csv",
                         ["sorbent_id", "adsorbate", "temperature_k", "pressure", "loading"],
                         [ident + [p, q] for p, q in zip(KPA, MMOL_PER_G)])
    expected = _summary(capsys, carrying)
    # kPa and mmol/g are 1000 Pa and 1 mol/kg: the same isotherm, the same fit
    assert expected[0]["q_sat_mol_per_kg"] > 2.71
    _assert_same_numbers(_summary(capsys, plain, "--units", "pressure:kPa,loading:mmol/g"), expected)
    _assert_same_numbers(_summary(capsys, plain, "--pressure-unit", "kPa", "--loading-unit", "mmol/g"),
                         expected)
    _assert_same_numbers(_summary(capsys, plain, "--units", "loading:mmol/g", "--pressure-unit", "kPa"),
                         expected)
    # absolute amounts: mmol adsorbed by a 0.25 g sample, divided by --sample-mass-g
    absolute = _points_file(tmp_path / "absolute.csv",
                            ["sorbent_id", "adsorbate", "temperature_k", "pressure_kpa", "loading"],
                            [ident + [p, q * 0.25] for p, q in zip(KPA, MMOL_PER_G)])
    _assert_same_numbers(_summary(capsys, absolute, "--loading-unit", "mmol", "--sample-mass-g", "0.25"),
                         expected)
    # and the same isotherm in bar, declared once
    in_bar = _points_file(tmp_path / "bar.csv",
                          ["sorbent_id", "adsorbate", "temperature_k", "pressure", "loading_mmol_per_g"],
                          [ident + [p / 100.0, q] for p, q in zip(KPA, MMOL_PER_G)])
    _assert_same_numbers(_summary(capsys, in_bar, "--pressure-unit", "bar"), expected)


@pytest.mark.parametrize("argv, words", [
    (["--units", "pressure:furlongs"], ["furlongs"]),
    (["--units", "pressure:kPa", "--pressure-unit", "bar"], ["pressure", "twice"]),
    (["--sample-mass-g", "-1"], ["positive"]),
    (["--gas", "R134a"], ["NAME:MOLAR_MASS"]),
    (["--gas", "R134a:heavy"], ["molar_mass"]),
])
def test_bad_reading_options_are_usage_errors(capsys, tmp_path, argv, words):
    path = _points_file(tmp_path / "p.csv", ["sorbent_id", "adsorbate", "temperature_k", "pressure",
                                             "loading"], [["S", "CO2", 298.15, 1, 1]])
    try:
        code, _, err = run_cli(capsys, path, *argv)
    except SystemExit as stop:  # argparse refuses a value its type check rejects
        code, err = stop.code, capsys.readouterr().err
    assert code == 2
    for word in words:
        assert word in err, err
    assert "Traceback" not in err


def test_semicolon_and_decimal_comma_file(capsys, tmp_path):
    header = ["sorbent_id", "adsorbate", "temperature_k", "pressure_kpa", "loading_mmol_per_g"]
    comma_file = _points_file(tmp_path / "points.csv", header,
                              [["TG31-EU-0001", "CO2", "298.15", p, q] for p, q in zip(KPA, MMOL_PER_G)])
    european = _points_file(tmp_path / "export.csv", header,
                            [["TG31-EU-0001", "CO2", "298,15", str(p).replace(".", ","),
                              str(q).replace(".", ",")] for p, q in zip(KPA, MMOL_PER_G)],
                            delimiter=";")
    expected = _summary(capsys, comma_file)
    _assert_same_numbers(_summary(capsys, european), expected)  # detected
    _assert_same_numbers(_summary(capsys, european, "--delimiter", "semicolon", "--decimal", "comma"),
                         expected)
    tab_file = _points_file(tmp_path / "points.tsv", header,
                            [["TG31-EU-0001", "CO2", "298.15", p, q] for p, q in zip(KPA, MMOL_PER_G)],
                            delimiter="\t")
    _assert_same_numbers(_summary(capsys, tab_file, "--delimiter", "tab"), expected)


def test_wrong_delimiter_names_the_file_and_what_it_saw(capsys, tmp_path):
    european = _points_file(tmp_path / "export.csv",
                            ["sorbent_id", "adsorbate", "temperature_k", "pressure_kpa",
                             "loading_mmol_per_g"],
                            [["TG31-EU-0001", "CO2", "298,15", "10", "0,5"]], delimiter=";")
    code, out, err = run_cli(capsys, european, "--delimiter", "tab")
    assert code == 2 and out == ""
    assert str(european) in err and "';'" in err and "delimiter" in err
    assert "Traceback" not in err


def test_a_declared_gas_is_accepted(capsys, tmp_path):
    # an invented gas (Tideglass-31 test gas, 88.0 g/mol): loadings in mg/g need
    # its molar mass, so the isotherm is refused until it is declared
    header = ["sorbent_id", "adsorbate", "temperature_k", "pressure_kpa", "loading_mg_per_g"]
    path = _points_file(tmp_path / "tg_gas.csv", header,
                        [["TG31-GAS-0001", "TG31-TESTGAS", "298.15", p, q * 88.0]
                         for p, q in zip(KPA, MMOL_PER_G)])
    code, _, err = run_cli(capsys, path)
    assert code == 1 and "TG31-TESTGAS" in err
    # models on absolute pressure only: CO2 has a p0 at 298.15 K, the test gas none
    models = ("--models", "langmuir,sips,toth")
    rows = _summary(capsys, path, "--gas", "TG31-TESTGAS:88.0", *models)
    assert rows[0]["adsorbate"] == "TG31-TESTGAS"
    # mg/g over g/mol is mmol/g: the loadings, hence q_sat, are the mmol/g file's
    same = _points_file(tmp_path / "mmol.csv", header[:4] + ["loading_mmol_per_g"],
                        [["TG31-GAS-0001", "CO2", "298.15", p, q] for p, q in zip(KPA, MMOL_PER_G)])
    assert rows[0]["q_sat_mol_per_kg"] == pytest.approx(
        _summary(capsys, same, *models)[0]["q_sat_mol_per_kg"], rel=1e-9)


# ---------------------------------------------------------------------------
# the table: q_sat interval, BET area, working capacity with its conditions

# BET with monolayer 10 mol/kg and C = 100 at x = p/p0 0.02..0.30 (invented,
# truth known): the area is n_m N_A sigma(N2) = 10e-3 mol/g x 6.02214076e23
# /mol x 0.162e-18 m2 = 975.6 m2/g (sigma 0.162 nm2: ISO 9277, from memory)
BET_X = np.linspace(0.02, 0.30, 15)
BET_Q = 10.0 * 100.0 * BET_X / ((1 - BET_X) * (1 - BET_X + 100.0 * BET_X))


def _conditions_doc(isotherms, adsorption_kpa, desorption_kpa):
    return {"isotherms": isotherms,
            "conditions": {"adsorption_pressure_kpa": adsorption_kpa,
                           "desorption_pressure_kpa": desorption_kpa}}


def test_table_shows_q_sat_interval_bet_area_and_working_capacity(capsys, tmp_path):
    path = tmp_path / "n2_and_co2.json"
    q_co2 = [6.0 * 3e-5 * p / (1 + 3e-5 * p) for p in P_PA]
    path.write_text(json.dumps(_conditions_doc([
        {"sorbent_id": "TG31-BET-0001", "adsorbate": "N2", "temperature_k": 77.35,
         "pressure_relative": BET_X.tolist(), "loading_mol_per_kg": BET_Q.tolist()},
        {"sorbent_id": "TG31-LANG-0001", "adsorbate": "CO2", "temperature_k": 298.15,
         "pressure_pa": P_PA.tolist(),
         "loading_mol_per_kg": [q * (1 + 0.003 * np.sin(7 * i)) for i, q in enumerate(q_co2)]},
    ], adsorption_kpa=500, desorption_kpa=100)))
    code, out, err = run_cli(capsys, path, "--workers", "1", "--sort", "sorbent_id")
    assert code == 0, err
    header, _, *rows = out.splitlines()
    for title in ("q_sat mol/kg [95 %]", "BET m2/g", "work. cap. mol/kg", "flags"):
        assert title in header
    summary = {r["sorbent_id"]: r for r in _summary(capsys, path, "--sort", "sorbent_id")}
    bet_row = next(r for r in rows if "TG31-BET-0001" in r)
    lang_row = next(r for r in rows if "TG31-LANG-0001" in r)

    bet = summary["TG31-BET-0001"]
    assert bet["bet_area_m2_per_g"] == pytest.approx(975.6, rel=0.01)
    assert f"  {bet['bet_area_m2_per_g']:.0f}  " in bet_row

    lang = summary["TG31-LANG-0001"]
    assert lang["best_model"] in lang_row.split()
    q, lo, hi = (lang[k] for k in ("q_sat_mol_per_kg", "q_sat_ci95_low_mol_per_kg",
                                   "q_sat_ci95_high_mol_per_kg"))
    assert lo < q < hi and q == pytest.approx(6.0, rel=0.02)
    assert f"{q:.2f} [{lo:.2f}, {hi:.2f}]" in lang_row
    # the batch's pressure swing, 500 -> 100 kPa, is 5 -> 1 bar
    assert f"{lang['working_capacity_mol_per_kg']:.3g} (5→1 bar)" in lang_row
    assert "—" in lang_row.split("(5→1 bar)")[0]  # no BET area for CO2 at 298 K


def test_table_marks_a_missing_interval_and_ends_long_lines_at_the_terminal(capsys):
    import pyarrow as pa

    from sorbrank.service.commands.fit import render_table
    from sorbrank.worker.isotherm import Conditions

    table = pa.table({
        "sorbent_id": ["TG31-A", "TG31-B"], "adsorbate": ["CO2", "CO2"],
        "temperature_k": [298.15, 298.15], "best_model": ["langmuir", None],
        "q_sat_mol_per_kg": [4.2134, None], "q_sat_ci95_low_mol_per_kg": [None, None],
        "q_sat_ci95_high_mol_per_kg": [None, None], "bet_area_m2_per_g": [None, None],
        "working_capacity_mol_per_kg": [1.5, None], "n_points": [8, 3],
        "quality_flags": [["capacity_extrapolated", "extrapolated_adsorption_pressure"], []],
    })
    text = render_table(table, "q_sat_mol_per_kg", Conditions(), width=None)
    first, second = text.splitlines()[2:]
    assert "4.21 [—]" in first and "1.5 (1→0.1 bar)" in first
    assert first.endswith("capacity_extrapolated,extrapolated_adsorption_pressure")
    assert second.split()[1:5] == ["TG31-B", "CO2", "298.15", "—"]
    narrow = render_table(table, "q_sat_mol_per_kg", Conditions(), width=60)
    assert all(len(line) <= 60 for line in narrow.splitlines())
    assert narrow.splitlines()[2].endswith("…")


def test_table_stars_figures_the_ranking_holds_unreliable():
    import pyarrow as pa

    from sorbrank.service.commands.fit import render_table
    from sorbrank.worker.isotherm import Conditions
    from sorbrank.worker.store import with_ranking_columns

    # invented rows: A's capacity is an extrapolation (flag), B's has a 40 % standard error,
    # C's is sound; the working capacity of A is also an extrapolation
    table = pa.table({
        "sorbent_id": ["TG31-A", "TG31-B", "TG31-C"], "adsorbate": ["CO2"] * 3,
        "temperature_k": [298.15] * 3, "best_model": ["langmuir"] * 3,
        "q_sat_mol_per_kg": [9.0, 4.0, 3.0], "q_sat_stderr_mol_per_kg": [0.1, 1.6, 0.05],
        "q_sat_ci95_low_mol_per_kg": [8.8, 1.8, 2.9], "q_sat_ci95_high_mol_per_kg": [9.2, 8.9, 3.1],
        "bet_area_m2_per_g": [None] * 3, "loading_ads_mol_per_kg": [2.0, 1.5, 1.0],
        "working_capacity_mol_per_kg": [1.5, 1.0, 0.8], "n_points": [8, 8, 8],
        "quality_flags": [["capacity_extrapolated", "extrapolated_adsorption_pressure"], [], []],
    })
    table = with_ranking_columns(table, [(1e5, 1e4)] * 3)
    lines = render_table(table, "q_sat_mol_per_kg", Conditions(), width=None).splitlines()
    a, b, c = lines[2:5]
    assert "9.00 [8.80, 9.20] *" in a and "1.5 (1→0.1 bar) *" in a
    assert "4.00 [1.80, 8.90] *" in b and "1 (1→0.1 bar) *" not in b
    assert "*" not in c
    assert lines[-1].startswith("* unreliable") and "25%" in lines[-1]


# ---------------------------------------------------------------------------
# JSON through orjson: the same document the json module wrote

def test_json_output_equals_the_json_module_document(capsys, screen_csv):
    from sorbrank.worker.intake import Limits, read_batch

    code, out, _ = run_cli(capsys, screen_csv, "--format", "json", "--sort", "isotherm_id",
                           "--workers", "1")
    assert code == 0
    result = process_batch(read_batch(screen_csv, limits=Limits.for_local_files()), FitOptions())
    doc = result.to_json()
    doc["isotherms"].sort(key=lambda rec: rec["isotherm_id"])
    before = json.loads(json.dumps(doc, allow_nan=False, indent=1))  # how fit wrote it before
    assert json.loads(out) == before
    assert len(before["isotherms"]) == 3 and before["rejected"]


def test_json_bytes_writes_non_finite_numbers_as_null():
    from sorbrank.service.commands.fit import json_bytes

    text = json_bytes({"a": [1.5, float("nan"), float("inf"), -float("inf")], "b": None})
    assert json.loads(text, parse_constant=lambda token: pytest.fail(token)) == \
        {"a": [1.5, None, None, None], "b": None}


# ---------------------------------------------------------------------------
# what a fit loads: not the web stack, plots, the property library or scipy.stats

def test_fit_imports_no_service_plotting_or_property_library(tmp_path):
    import subprocess
    import sys

    path = _points_file(tmp_path / "six.csv", ["sorbent_id", "adsorbate", "temperature_k",
                                               "pressure_kpa", "loading_mmol_per_g"],
                        [["TG31-FAST-0001", "CO2", "298.15", p, q]
                         for p, q in zip(KPA[:6], MMOL_PER_G[:6])])
    probe = (
        "import sys\n"
        "from sorbrank.service.cli import main\n"
        f"code = main(['fit', {str(path)!r}])\n"
        "heavy = ('flask', 'celery', 'matplotlib', 'CoolProp', 'scipy.stats', 'redis', 'gunicorn',\n"
        "         'sorbrank.service.commands.serve', 'sorbrank.service.commands.plot')\n"
        "print('LOADED', code, sorted(m for m in heavy if m in sys.modules))\n")
    run = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    assert run.stdout.splitlines()[-1] == "LOADED 0 []", run.stdout

    # the command line itself, as python -X importtime lists what it imported
    run = subprocess.run([sys.executable, "-X", "importtime", "-m", "sorbrank.service.cli", "fit",
                          str(path)], capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    imported = {line.rsplit("|", 1)[1].strip() for line in run.stderr.splitlines()
                if line.startswith("import time:") and "|" in line}
    assert "sorbrank.worker.engine" in imported  # the listing is what it claims to be
    roots = {name.split(".")[0] for name in imported}
    assert not roots & {"flask", "celery", "matplotlib", "CoolProp", "redis", "gunicorn"}
    assert "scipy.stats" not in imported


def test_fit_ranks_like_rank_unreliable_last_and_warns_on_mixed_temperatures(capsys, tmp_path):
    """Truth set of our own (Langmuir, measured 1-100 kPa): with the adsorption
    pressure at 5 bar every loading is an extrapolation; at the default 1 bar
    none is. Two temperatures in one ranking of loadings draw a warning."""
    from sorbrank.service.commands.fit import DEFAULT_SORT
    from sorbrank.worker.store import DEFAULT_RANKING_SORT

    assert DEFAULT_SORT == DEFAULT_RANKING_SORT
    lines = ["sorbent_id,adsorbate,temperature_k,pressure_kpa,loading_mol_per_kg"]
    for sorbent, q_sat, b, t in (("W-1", 2.0, 0.1, 298.15), ("W-2", 5.0, 0.01, 298.15),
                                 ("W-3", 3.0, 0.1, 273.15)):
        lines += [f"{sorbent},CO2,{t},{p},{q_sat * b * p / (1 + b * p):.6f}"
                  for p in (1, 2, 5, 10, 20, 40, 60, 80, 100)]
    # W-4 was measured only to 40 kPa: its loading at 1 bar is an extrapolation
    lines += [f"W-4,CO2,298.15,{p},{9.0 * 0.1 * p / (1 + 0.1 * p):.6f}"
              for p in (1, 2, 5, 10, 20, 30, 40)]
    path = tmp_path / "w.csv"
    path.write_text("\n".join(lines) + "\n")
    code, out, err = run_cli(capsys, str(path), "--format", "csv", "--models", "langmuir")
    assert code == 0
    rows = list(csv.DictReader(io.StringIO(out)))
    # q(100 kPa): W-4 8.18 (extrapolated), W-3 2.727, W-2 2.5, W-1 1.818 mol/kg
    assert [r["sorbent_id"] for r in rows] == ["W-3", "W-2", "W-1", "W-4"]
    assert [r["loading_ads_reliable"] for r in rows] == ["true", "true", "true", "false"]
    assert {r["adsorption_pressure_pa"] for r in rows} == {"100000.0"}  # a float's repr
    assert [r["adsorption_temperature_k"] for r in rows] == ["273.15", "298.15", "298.15", "298.15"]
    _, out, _ = run_cli(capsys, str(path), "--format", "csv", "--models", "langmuir",
                        "--unreliable-in-place")
    assert [r["sorbent_id"] for r in csv.DictReader(io.StringIO(out))] == ["W-4", "W-3", "W-2", "W-1"]
    assert "2 different sets of conditions" in err and "adsorption_temperature_k 273.15" in err
    # one temperature: no warning
    _, _, err = run_cli(capsys, str(path), "--format", "csv", "--models", "langmuir",
                        "--sort", "q_sat_mol_per_kg")
    assert "different sets of conditions" not in err
