"""The Python API: ``sorbrank.fit`` and its ``Results``.

Data are truth-known synthetic Langmuir isotherms of invented Tideglass-31
sorbents: q = q_sat b p / (1 + b p), noise-free, so the numbers the engine
must recover are known exactly.
"""
from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import sorbrank
from conftest import ROOT, clean_env

from api_truth import TRUTH, by_isotherm, frame, langmuir_mmol_per_g, plain


NUMBERS = ["temperature_k", "n_points", "q_sat_mol_per_kg", "henry_mol_per_kg_pa",
           "working_capacity_mol_per_kg"]


def test_dataframe_with_unit_columns_gives_one_summary_row_per_isotherm():
    results = sorbrank.fit(frame())
    summary = results.summary
    assert isinstance(summary, pd.DataFrame)
    assert len(summary) == len(TRUTH)
    assert "q_sat_mol_per_kg" in summary.columns
    assert sorted(zip(summary.sorbent_id, summary.adsorbate, summary.temperature_k)) == \
        sorted((s, g, t) for s, g, t, _, _ in TRUTH)
    assert summary["best_model"].notna().all()
    assert results.rejected == []
    assert isinstance(results.fits, pd.DataFrame) and len(results.fits) > len(TRUTH)


@pytest.mark.parametrize("units", [{"pressure": "kPa", "loading": "mmol/g"},
                                   "pressure:kPa,loading:mmol/g"])
def test_plain_columns_with_units_give_the_same_numbers(units):
    carried = by_isotherm(sorbrank.fit(frame()).summary)
    declared = by_isotherm(sorbrank.fit(plain(frame()), units=units).summary)
    assert list(declared.isotherm_id) == list(carried.isotherm_id)
    pd.testing.assert_frame_equal(declared[NUMBERS], carried[NUMBERS])
    assert list(declared.best_model) == list(carried.best_model)


def test_plain_columns_without_units_are_rejected_not_guessed():
    results = sorbrank.fit(plain(frame()))
    assert results.n_isotherms == 0
    assert results.rejected, "an isotherm without units must be rejected"
    assert all(issue["code"] in ("missing_unit",) for issue in results.rejected)


def test_every_kind_of_input_gives_the_same_results(tmp_path):
    df = frame()
    table = pa.Table.from_pandas(df, preserve_index=False)
    csv_path = tmp_path / "tg31-night-1.csv"
    df.to_csv(csv_path, index=False)
    parquet_path = tmp_path / "tg31-night-1.parquet"
    pq.write_table(table, parquet_path)
    first, second = tmp_path / "part-1.csv", tmp_path / "part-2.csv"
    df[df.sorbent_id == "TG31-0001"].to_csv(first, index=False)
    df[df.sorbent_id == "TG31-0002"].to_csv(second, index=False)

    reference = by_isotherm(sorbrank.fit(df).summary)
    inputs = {"table": table, "csv path (str)": str(csv_path), "csv path": csv_path,
              "parquet path": parquet_path, "csv bytes": csv_path.read_bytes(),
              "parquet bytes": parquet_path.read_bytes(), "two paths": [first, second]}
    for name, data in inputs.items():
        got = by_isotherm(sorbrank.fit(data).summary)
        assert list(got.isotherm_id) == list(reference.isotherm_id), name
        pd.testing.assert_frame_equal(got[NUMBERS], reference[NUMBERS], obj=name)
    assert sorbrank.fit([first, second]).batch_label.count("+") == 1


def test_results_equal_sorbrank_fit_json_on_the_same_file(tmp_path):
    """One engine: every number of `sorbrank fit --format json` equals the API's."""
    path = tmp_path / "tg31-night-2.csv"
    frame().to_csv(path, index=False)
    out = subprocess.run([sys.executable, "-m", "sorbrank.service.cli", "fit", str(path),
                          "--format", "json"], capture_output=True, text=True, timeout=300,
                         env=clean_env(PYTHONPATH=str(ROOT)), cwd=str(tmp_path))
    assert out.returncode == 0, out.stderr
    cli = json.loads(out.stdout)
    api = sorbrank.fit(path)
    mine = json.loads(json.dumps(api.records(), allow_nan=False))
    by_id = lambda records: {r["isotherm_id"]: r for r in records}  # noqa: E731
    assert by_id(cli["isotherms"]) == by_id(mine)
    summary = api.summary.set_index("isotherm_id")
    for record in cli["isotherms"]:
        assert summary.loc[record["isotherm_id"], "q_sat_mol_per_kg"] == \
            record["summary"]["q_sat_mol_per_kg"]


def test_truth_known_langmuir_recovers_its_capacity_and_affinity():
    results = sorbrank.fit(frame(), models=["langmuir"])
    fits = results.fits.set_index(["sorbent_id", "adsorbate", "temperature_k"])
    summary = results.summary.set_index(["sorbent_id", "adsorbate", "temperature_k"])
    for sorbent, gas, t_k, q_sat, b_per_kpa in TRUTH:
        row = fits.loc[(sorbent, gas, t_k)]
        assert row["converged"]
        # mmol/g = mol/kg; b in 1/kPa = 1e-3 /Pa
        assert row["param_q_sat"] == pytest.approx(q_sat, rel=1e-6)
        assert row["param_affinity"] == pytest.approx(b_per_kpa * 1e-3, rel=1e-6)
        assert summary.loc[(sorbent, gas, t_k), "q_sat_mol_per_kg"] == pytest.approx(q_sat, rel=1e-6)


@pytest.mark.parametrize("data, units, conditions", [
    (frame(), None, {"adsorption_pressure_kpa": 50, "desorption_pressure_kpa": 5}),
    (plain(frame()), {"pressure": "kPa", "loading": "mmol/g"},
     {"adsorption_pressure": 50, "desorption_pressure": 5}),
])
def test_conditions_set_the_working_capacity(data, units, conditions):
    results = sorbrank.fit(data, units=units, models=["langmuir"], conditions=conditions)
    summary = results.summary.set_index(["sorbent_id", "adsorbate", "temperature_k"])
    for sorbent, gas, t_k, q_sat, b in TRUTH:
        expected = float(langmuir_mmol_per_g(q_sat, b, 50) - langmuir_mmol_per_g(q_sat, b, 5))
        assert summary.loc[(sorbent, gas, t_k), "working_capacity_mol_per_kg"] == \
            pytest.approx(expected, rel=1e-6)


def test_mixtures_give_iast_rows_in_the_sorbent_table():
    # IAST on two Langmuir isotherms of equal capacity reduces to the extended
    # Langmuir model, selectivity = b1/b2 (Myers & Prausnitz, AIChE J. 11 (1965)
    # 121; the reduction is a textbook result, stated from memory)
    results = sorbrank.fit(frame(), models=["langmuir"],
                           mixtures=[{"sorbent_id": "TG31-0002", "components": ["CO2", "N2"],
                                      "mole_fractions": [0.15, 0.85], "total_pressure_kpa": 100,
                                      "temperature_k": 298.15}])
    sorbents = results.sorbents
    iast = sorbents[sorbents["kind"] == "iast"]
    assert len(iast) == 1
    assert iast.iloc[0]["selectivity"] == pytest.approx(0.30 / 0.004, rel=1e-6)


def test_bad_rows_reach_rejected_with_row_and_field_and_the_rest_is_fitted():
    df = frame()
    df["loading_mmol_per_g"] = df["loading_mmol_per_g"].astype(object)
    bad_row = 14  # 0-based position: the third point of the second isotherm
    df.loc[bad_row, "loading_mmol_per_g"] = "n/a"
    results = sorbrank.fit(df)
    assert results.n_isotherms == len(TRUTH) - 1
    issues = [i for i in results.rejected if i["code"] == "not_a_number"]
    assert len(issues) == 1
    issue = issues[0]
    assert issue["row"] == bad_row + 1  # 1-based table row, as for Parquet
    assert issue["field"] == "loading_mmol_per_g"  # the column as named in the frame
    assert set(issue) == {"batch", "isotherm", "row", "field", "code", "message"}
    assert "TG31-0001" in issue["message"] or "TG31-0001" in str(issue["isotherm"])


@pytest.mark.parametrize("kwargs, words", [
    ({"criterion": "aiccc"}, "criterion"),
    ({"weighting": "squares"}, "weighting"),
    ({"models": "langmuir,no_such_model"}, "no_such_model"),
    ({"units": {"pressure": "furlong"}}, "furlong"),
    ({"units": "pressure=kPa"}, "pressure=kPa"),
    ({"sample_mass_g": -1.0}, "sample_mass_g"),
    ({"sample_mass_g": "heavy"}, "sample_mass_g"),
    ({"workers": 0}, "workers"),
    ({"conditions": {"adsorption_presure_kpa": 1}}, "adsorption_presure_kpa"),
])
def test_bad_keyword_values_raise_a_clear_value_error(kwargs, words):
    with pytest.raises(ValueError) as info:
        sorbrank.fit(frame(), **kwargs)
    assert words in str(info.value)


def test_inputs_that_are_not_data_say_what_is_accepted(tmp_path):
    with pytest.raises(TypeError, match="DataFrame"):
        sorbrank.fit(42)
    with pytest.raises(FileNotFoundError, match="no such file"):
        sorbrank.fit(str(tmp_path / "missing.csv"))
    with pytest.raises(ValueError, match="as bytes"):
        sorbrank.fit("sorbent_id,adsorbate\nTG31-0001,CO2\n")
    with pytest.raises(ValueError, match="empty"):
        sorbrank.fit([])


def test_to_arrow_gives_the_tables_behind_the_dataframes():
    results = sorbrank.fit(frame())
    for name in ("summary", "fits", "sorbents"):
        table = results.to_arrow(name)
        assert isinstance(table, pa.Table)
        assert table.num_rows == len(getattr(results, name))
    assert results.to_arrow() is results.to_arrow("summary")
    with pytest.raises(ValueError, match="summary, fits, sorbents"):
        results.to_arrow("everything")
    # each access is a new DataFrame: editing one does not change the next
    first = results.summary
    first.loc[:, "q_sat_mol_per_kg"] = -1.0
    assert (results.summary["q_sat_mol_per_kg"] > 0).all()


def test_plot_returns_a_figure_of_the_chosen_isotherm():
    from matplotlib.figure import Figure

    results = sorbrank.fit(frame())
    fig = results.plot("TG31-0001", "CO2", 298)
    assert isinstance(fig, Figure)
    gids = {artist.get_gid() for ax in fig.axes for artist in ax.get_children()}
    assert {"data", "fit-selected", "residuals"} <= gids
    assert isinstance(results.plot(sorbent_id="TG31-0002", adsorbate="N2",
                                   kind="langmuir-linear"), Figure)
    with pytest.raises(ValueError, match="2 isotherms match"):
        results.plot("TG31-0001")
    with pytest.raises(ValueError, match="no accepted isotherm matches"):
        results.plot("TG31-9999")
    with pytest.raises(ValueError, match="kind"):
        results.plot("TG31-0002", "N2", kind="pie")


def test_html_view_is_compact_and_escaped():
    truth = [(f"TG31-{i:04d}", "CO2", 298.15, 3.0, 0.1) for i in range(12)]
    truth.append(('TG31-<b>"x"&y', "CO2", 298.15, 3.0, 0.1))
    results = sorbrank.fit(frame(truth))
    page = results._repr_html_()
    assert page.count("<tr>") == 1 + 10  # header and the first ten rows
    assert "13 isotherm(s)" in page and "3 more row(s)" in page
    # the sorbent with markup in its id, shown first
    results = sorbrank.fit(frame(truth[-1:]))
    page = results._repr_html_()
    assert "TG31-&lt;b&gt;&quot;x&quot;&amp;y" in page and '<b>"x"' not in page
    assert "298.15" in page and "q_sat_mol_per_kg" in page
    assert repr(results).startswith("<sorbrank.Results batch ")
    assert "Rejected" not in page
    # rejections are counted and the first few shown, escaped
    typo = frame(truth[-1:]).astype({"loading_mmol_per_g": object})
    typo.loc[3, "loading_mmol_per_g"] = "<i>n/a</i>"
    page = sorbrank.fit(typo)._repr_html_()
    assert "0 isotherm(s)" in page and "Rejected (first 1 of 1" in page
    assert "&lt;i&gt;n/a&lt;/i&gt;" in page and "<i>n/a" not in page


def run_python(code: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=300, env=clean_env(PYTHONPATH=str(ROOT)))


def test_import_sorbrank_loads_no_engine_server_or_plotting():
    heavy = ("flask", "celery", "matplotlib", "scipy", "pandas", "numpy", "pyarrow", "CoolProp")
    out = run_python(
        "import sys, sorbrank\n"
        f"print([m for m in {heavy!r} if m in sys.modules])\n"
        "sorbrank.fit, sorbrank.Results, sorbrank.Client\n"
        f"print([m for m in {heavy!r} if m in sys.modules])\n"
        "print(sorbrank.__version__)\n")
    assert out.returncode == 0, out.stderr
    lines = out.stdout.splitlines()
    assert lines[0] == "[]", "import sorbrank must stay light"
    loaded = eval(lines[1])  # a printed list of module names
    assert not {"flask", "celery", "matplotlib", "pandas"} & set(loaded), loaded
    assert lines[2] == sorbrank.__version__


def test_fit_of_a_file_works_without_pandas(tmp_path):
    path = tmp_path / "tg31.parquet"
    pq.write_table(pa.Table.from_pylist(frame().to_dict("records")), path)
    out = run_python(
        "import sys\n"
        "class NoPandas:  # as if pandas were not installed\n"
        "    def find_spec(self, name, path=None, target=None):\n"
        "        if name.split('.')[0] == 'pandas':\n"
        "            raise ModuleNotFoundError(\"No module named 'pandas'\", name='pandas')\n"
        "sys.meta_path.insert(0, NoPandas())\n"
        "import sorbrank\n"
        f"results = sorbrank.fit({str(path)!r})\n"
        "print(results.to_arrow().num_rows)\n"
        "print('matplotlib' in sys.modules, 'flask' in sys.modules)\n"
        "try:\n    results.summary\nexcept ImportError as exc:\n    print(exc)\n")
    assert out.returncode == 0, out.stderr
    rows, loaded, message = out.stdout.splitlines()
    assert int(rows) == len(TRUTH)
    assert loaded == "False False"
    assert "pip install 'sorbrank[pandas]'" in message


def test_a_dataframe_index_is_left_out():
    df = frame()
    df.index = [f"r{i}" for i in range(len(df))]
    summary = sorbrank.fit(df).summary
    assert len(summary) == len(TRUTH)
    assert not any(c.startswith("__index_level") for c in summary.columns)


def test_workers_split_a_large_batch_with_the_same_results():
    rng = np.random.default_rng(31)
    truth = [(f"TG31-{i:04d}", "CO2", 298.15, float(q), float(b))
             for i, (q, b) in enumerate(zip(rng.uniform(1, 6, 2100), rng.uniform(0.01, 0.5, 2100)))]
    df = frame(truth)
    serial = sorbrank.fit(df, models=["langmuir"]).to_arrow()
    parallel = sorbrank.fit(df, models=["langmuir"], workers=2).to_arrow()
    assert serial.num_rows == 2100  # more than one 2,000-isotherm chunk
    assert parallel.equals(serial)


def test_a_declared_gas_converts_mass_loadings_by_its_molar_mass():
    # an invented probe gas: mg/g divided by its molar mass is mmol/g = mol/kg
    df = frame([("TG31-0003", "TG-probe-7", 298.15, 2.0, 0.2)])
    df["loading_mg_per_g"] = df.pop("loading_mmol_per_g") * 120.0
    unknown = sorbrank.fit(df, models=["langmuir"])
    assert unknown.n_isotherms == 0
    assert [i["code"] for i in unknown.rejected] == ["unknown_adsorbate"]
    declared = sorbrank.fit(df, models=["langmuir"],
                            gases=[{"name": "TG-probe-7", "molar_mass_g_per_mol": 120.0}])
    assert declared.rejected == []
    assert declared.summary["q_sat_mol_per_kg"].tolist() == pytest.approx([2.0], rel=1e-6)
    with pytest.raises(ValueError, match="molar_mass_g_per_mol"):
        sorbrank.fit(df, gases=[{"name": "TG-probe-7"}])
