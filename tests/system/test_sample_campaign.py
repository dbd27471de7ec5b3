"""The invented demo campaign in sample_batches/: reproducible, complete, and
its files agree with the ground truth saved beside them."""
from __future__ import annotations

import csv
import importlib.util
import json
import re
import subprocess
import sys
from collections import defaultdict
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from scipy import constants, integrate, optimize

SAMPLES = Path(__file__).resolve().parents[2] / "sample_batches"
ID_PATTERN = re.compile(r"^[A-Za-z0-9-]+$")

# Unit factors typed here independently of the generator, so a conversion
# slip there shows up as a misfit against the ground truth.
PA_PER = {"Pa": 1.0, "kPa": 1e3, "MPa": 1e6, "bar": 1e5, "mbar": 100.0,
          "psi": 6894.757293168}  # psi: 0.45359237 kgf per (0.0254 m)^2, exact
STP_CM3_PER_MMOL = constants.R * 273.15 / 101_325.0 * 1e3  # 273.15 K, 101.325 kPa
MOLAR_MASS = {"CO2": 44.0095, "N2": 28.0134, "CH4": 16.0425}  # g/mol (from memory)


def to_mol_per_kg(values, unit, gas):
    values = np.asarray(values, dtype=float)
    if unit in ("mol/kg", "mmol/g"):
        return values
    if unit == "cm3(STP)/g":
        return values / STP_CM3_PER_MMOL
    if unit == "mg/g":
        return values / MOLAR_MASS[gas]
    raise AssertionError(f"test does not know unit {unit}")


def load_generator():
    spec = importlib.util.spec_from_file_location("sample_generate", SAMPLES / "generate.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def gen():
    return load_generator()


@pytest.fixture(scope="module")
def truth():
    return json.loads((SAMPLES / "ground_truth.json").read_text())


@pytest.fixture(scope="module")
def regenerated(tmp_path_factory, truth):
    out = tmp_path_factory.mktemp("campaign")
    subprocess.run([sys.executable, str(SAMPLES / "generate.py"),
                    "--seed", str(truth["campaign"]["seed"]), "--out", str(out)],
                   check=True, capture_output=True)
    return out


# input column-name tokens (docs/formats.md), typed here independently of the product
TOKEN_UNIT = {"pa": "Pa", "kpa": "kPa", "bar": "bar", "mbar": "mbar", "psi": "psi",
              "relative": "relative", "mol_per_kg": "mol/kg", "mmol_per_g": "mmol/g",
              "mg_per_g": "mg/g", "cm3stp_per_g": "cm3(STP)/g"}


def quantity_column(names, quantity, declared):
    """(column name, unit) of ``quantity`` among ``names``: a unit-suffixed name, else the
    plain one with the declared unit."""
    for name in names:
        if name.startswith(quantity + "_") and name[len(quantity) + 1:] in TOKEN_UNIT:
            return name, TOKEN_UNIT[name[len(quantity) + 1:]]
    assert quantity in names, names
    return quantity, declared[quantity]


def declaration(text):
    return dict(item.split(":", 1) for item in text.split(","))


def read_points(path: Path):
    """{isotherm_id: dict(adsorbate, temperature_k, p_unit, q_unit, pressure, loading)}
    from any of the three formats, good isotherms only parsed as floats."""
    out = defaultdict(lambda: {"pressure": [], "loading": []})
    if path.suffix == ".json":
        doc = json.loads(path.read_text())
        for item in doc["isotherms"]:
            rec = out[item["isotherm_id"]]
            declared = {**doc["units"], **item.get("units", {})}
            p_key, p_unit = quantity_column(list(item), "pressure", declared)
            q_key, q_unit = quantity_column(list(item), "loading", declared)
            rec.update(sorbent_id=item["sorbent_id"], adsorbate=item["adsorbate"],
                       temperature_k=item["temperature_k"], p_unit=p_unit, q_unit=q_unit,
                       pressure=item[p_key], loading=item[q_key])
        return dict(out)
    decimal_comma = False
    if path.suffix == ".parquet":
        table = pq.read_table(path)
        meta = {k.decode(): v.decode() for k, v in (table.schema.metadata or {}).items()}
        rows, names = table.to_pylist(), table.column_names
    else:
        lines = path.read_text().splitlines()
        meta = dict(line[1:].strip().split(": ", 1) for line in lines if line.startswith("#"))
        body = [line for line in lines if not line.startswith("#")]
        delimiter = max(",;\t", key=body[0].count)
        decimal_comma = delimiter != ","
        rows = list(csv.DictReader(body, delimiter=delimiter))
        names = list(rows[0])
    declared = declaration(meta["units"]) if "units" in meta else {}
    p_key, p_unit = quantity_column(names, "pressure", declared)
    q_key, q_unit = quantity_column(names, "loading", declared)

    def number(value):
        return value.replace(",", ".") if decimal_comma and isinstance(value, str) else value

    for row in rows:
        rec = out[row["isotherm_id"]]
        rec.update(sorbent_id=row["sorbent_id"], adsorbate=row["adsorbate"],
                   temperature_k=float(number(row["temperature_k"])), p_unit=p_unit, q_unit=q_unit)
        rec["pressure"].append(number(row[p_key]))
        rec["loading"].append(number(row[q_key]))
    return dict(out)


def true_loading(item, pressure_pa):
    """The generating model written again from the published equations."""
    total = np.zeros_like(pressure_pa)
    for site in item["params"]:
        bp = site["affinity_per_pa"] * pressure_pa
        if item["model"] == "sips":
            total += site["q_sat_mol_per_kg"] * bp ** site["n"] / (1 + bp ** site["n"])
        elif item["model"] == "toth":
            total += site["q_sat_mol_per_kg"] * bp / (1 + bp ** site["t"]) ** (1 / site["t"])
        else:
            assert item["model"] in ("langmuir", "dual_site_langmuir")
            total += site["q_sat_mol_per_kg"] * bp / (1 + bp)
    return total


# ------------------------------------------------------------ reproducibility
def test_regeneration_is_identical(regenerated, truth):
    committed = sorted(p.name for p in SAMPLES.iterdir()
                       if p.is_file() and p.name not in ("generate.py", "README.md"))
    assert committed == sorted(p.name for p in regenerated.iterdir())
    assert set(committed) == set(truth["campaign"]["files"]) | {"ground_truth.json"}
    for name in committed:
        if name.endswith(".parquet"):
            old, new = pq.read_table(SAMPLES / name), pq.read_table(regenerated / name)
            assert old.equals(new, check_metadata=True), name
        else:
            assert (SAMPLES / name).read_bytes() == (regenerated / name).read_bytes(), name


def test_seed_changes_the_data(tmp_path, gen):
    other = gen.generate(tmp_path, seed=gen.DEFAULT_SEED + 1)
    ours = json.loads((SAMPLES / "ground_truth.json").read_text())
    assert other["campaign"]["seed"] != ours["campaign"]["seed"]
    assert (tmp_path / "b01_fram_kpa_mmolg.csv").read_bytes() != (SAMPLES / "b01_fram_kpa_mmolg.csv").read_bytes()


# ------------------------------------------------------------ completeness
@pytest.fixture(scope="module")
def good_files(truth):
    return {name: read_points(SAMPLES / name) for name in truth["campaign"]["files"]
            if "resend" not in name}


def test_campaign_shape(good_files, truth):
    gases = defaultdict(set)
    sorbents_77k = set()
    for isotherms in good_files.values():
        for iso_id, rec in isotherms.items():
            assert ID_PATTERN.match(iso_id) and ID_PATTERN.match(rec["sorbent_id"]), iso_id
            if rec["temperature_k"] < 100:
                sorbents_77k.add(rec["sorbent_id"])
            else:
                gases[rec["sorbent_id"]].add((rec["adsorbate"], rec["temperature_k"]))
    assert 220 <= len(gases) <= 260
    assert len(gases) == truth["campaign"]["sorbent_count"]
    wanted = {(g, t) for g in ("CO2", "N2", "CH4") for t in (273.15, 298.15, 323.15)}
    assert all(found == wanted for found in gases.values())
    assert 50 <= len(sorbents_77k) <= 70 and sorbents_77k <= set(gases)
    families = {m.split("-")[1] for m in gases}
    assert len(families) >= 3


def test_every_isotherm_in_files_is_in_truth(truth):
    good = {item["isotherm_id"]: item for item in truth["isotherms"]}
    bad = {item["isotherm_id"]: item for item in truth["bad_datasets"]}
    assert not set(good) & set(bad)
    in_files = {}
    for name in truth["campaign"]["files"]:
        for iso_id in read_points(SAMPLES / name):
            in_files[iso_id] = name
    assert set(in_files) == set(good) | set(bad)
    for iso_id, item in {**good, **bad}.items():
        assert in_files[iso_id] == item["file"], iso_id
    expected = {(b["expected"], b["code"]) for b in truth["bad_datasets"]}
    for case in ("unknown_unit", "negative_value", "too_few_points", "relative_pressure_above_one",
                 "unknown_adsorbate", "not_a_number"):
        assert ("rejected", case) in expected
    assert ("accepted_flagged", "non_monotonic_loading") in expected


# ------------------------------------------------------------ files agree with truth
def test_gas_isotherms_scatter_around_truth_as_the_noise_says(truth):
    good = {item["isotherm_id"]: item for item in truth["isotherms"]}
    noise = truth["campaign"]["noise"]
    for name in truth["campaign"]["files"]:
        if name == "b06_n2_77k_relative.csv":
            continue  # 77 K set: checked by the BET test
        z_all = []
        for iso_id, rec in read_points(SAMPLES / name).items():
            item = good.get(iso_id)
            if item is None:
                continue  # a deliberately bad dataset
            p_pa = np.asarray(rec["pressure"], dtype=float) * PA_PER[rec["p_unit"]]
            q = to_mol_per_kg(rec["loading"], rec["q_unit"], rec["adsorbate"])
            q_true = true_loading(item, p_pa)
            sd = np.hypot(noise["relative"] * q_true, noise["absolute_mol_per_kg"])
            z_all.append((q - q_true) / sd)
            fraction = true_loading(item, np.array([p_pa.max()]))[0] / item["q_sat_mol_per_kg"]
            assert item["capacity_resolvable"] == (fraction >= 0.6), iso_id
        z = np.concatenate(z_all)
        # RMS of N unit normals is 1 with sd about 1/sqrt(2N); allow 5 sd
        assert abs(np.sqrt(np.mean(z**2)) - 1) < 5 / np.sqrt(2 * z.size), name
        assert np.max(np.abs(z)) < 6.5, name


def test_bet_area_recovered_from_77k_file_in_standard_window(good_files, truth):
    # BET (Brunauer, Emmett & Teller 1938) linear form in 0.05..0.30; area with
    # 0.162 nm2 per N2 (IUPAC 2015 physisorption report)
    good = {item["isotherm_id"]: item for item in truth["isotherms"]}
    tolerance = truth["tolerances"]["bet_area"]["relative"]
    errors = []
    for iso_id, rec in good_files["b06_n2_77k_relative.csv"].items():
        x = np.asarray(rec["pressure"], dtype=float)
        n = to_mol_per_kg(rec["loading"], rec["q_unit"], "N2")
        window = (x >= 0.05) & (x <= 0.30)
        slope, intercept = np.polyfit(x[window], x[window] / (n[window] * (1 - x[window])), 1)
        n_m_mol_per_g = 1e-3 / (slope + intercept)
        area = n_m_mol_per_g * constants.N_A * 0.162e-18
        assert area == pytest.approx(good[iso_id]["bet_area_m2_per_g"], rel=tolerance), iso_id
        errors.append(area / good[iso_id]["bet_area_m2_per_g"] - 1)
    assert len(errors) == 60
    # the curve is exact BET in the window, so only noise remains: no bias
    # (each error has sd ~0.6 %, their mean ~0.08 %)
    assert abs(np.mean(errors)) < 0.005


# ------------------------------------------------------------ truth computations
def test_iast_reduces_to_extended_langmuir_for_equal_capacities(gen):
    # Myers & Prausnitz 1965: with equal q_sat, IAST is exactly extended Langmuir,
    # whose selectivity is b1/b2
    def langmuir(q_sat, b_at_298):
        return {"model": "langmuir", "sites": [{"q_sat_mol_per_kg": q_sat, "heat_j_per_mol": 0.0,
                                                "b0_per_pa": b_at_298}]}
    res = gen.iast_binary(langmuir(4.0, 3e-5), langmuir(4.0, 2e-6), 0.15, 1e5, 298.15)
    assert res["selectivity"] == pytest.approx(15.0, rel=1e-9)
    denominator = 1 + 3e-5 * 0.15e5 + 2e-6 * 0.85e5
    assert res["loading_1_mol_per_kg"] == pytest.approx(4.0 * 3e-5 * 0.15e5 / denominator, rel=1e-9)


def test_toth_spreading_pressure_matches_quadrature(gen):
    site = {"q_sat_mol_per_kg": 5.0, "heat_j_per_mol": 0.0, "b0_per_pa": 2e-5, "t": 0.55}
    toth = {"model": "toth", "sites": [site]}
    for p_pa in (10.0, 1e4, 3e5, 5e7):
        expected, _ = integrate.quad(lambda p: gen.loading_mol_per_kg(toth, p, 300.0) / p, 0, p_pa,
                                     limit=200, points=[1 / 2e-5])
        assert gen.spreading_mol_per_kg(toth, p_pa, 300.0) == pytest.approx(expected, rel=1e-7)


def test_isosteric_heats_match_clausius_clapeyron(truth, gen):
    # Clausius-Clapeyron at constant loading: Q = -R d(ln p)/d(1/T), by central
    # differences on the true model (the generator uses a closed form)
    sorbent = truth["isosteric_heats"][0]["sorbent_id"]
    sorbents = gen.build_campaign(truth["campaign"]["seed"])
    for row in truth["isosteric_heats"]:
        if row["sorbent_id"] != sorbent:
            continue
        gas_truth = sorbents[sorbent]["gases"][row["adsorbate"]]
        points = row.get("at_298_15_k") or [{"loading_mol_per_kg": 0.5,
                                             "isosteric_heat_j_per_mol": row["isosteric_heat_j_per_mol"]}]
        for point in points:
            def ln_p(temperature_k):
                return np.log(optimize.brentq(
                    lambda p: gen.loading_mol_per_kg(gas_truth, p, temperature_k) - point["loading_mol_per_kg"],
                    1e-9, 1e13, xtol=1e-14, rtol=1e-14))
            h = 0.01
            slope = (ln_p(298.15 + h) - ln_p(298.15 - h)) / (1 / (298.15 + h) - 1 / (298.15 - h))
            assert -constants.R * slope == pytest.approx(point["isosteric_heat_j_per_mol"], rel=1e-5)


# ------------------------------------------------------------ through intake
def test_intake_accepts_good_and_rejects_bad_as_ground_truth_says(truth):
    from sorbrank.worker.intake import read_batch

    good = {item["isotherm_id"]: item for item in truth["isotherms"]}
    bad = {item["isotherm_id"]: item for item in truth["bad_datasets"]}
    noise = truth["campaign"]["noise"]
    accepted_all, rejected_all = {}, defaultdict(set)
    for name in truth["campaign"]["files"]:
        batch = read_batch(SAMPLES / name)
        assert batch.label == f"tideglass-31-{name[:3]}"
        z = []
        for iso in batch.isotherms:
            accepted_all[iso.isotherm_id] = iso
            item = good.get(iso.isotherm_id)
            if item is None:
                continue
            assert iso.n_points == item["n_points"], iso.isotherm_id
            assert iso.pressure_pa.max() == pytest.approx(item["p_max_pa"], rel=1e-6)
            if item["q_sat_mol_per_kg"] is None:
                assert iso.saturation_pressure_pa == pytest.approx(truth["campaign"]["n2_77k"]["saturation_pressure_pa"])
                continue
            q_true = true_loading(item, iso.pressure_pa)
            z.append((iso.loading_mol_per_kg - q_true) / np.hypot(noise["relative"] * q_true,
                                                                  noise["absolute_mol_per_kg"]))
        if z:  # intake's unit conversion lands on the truth within the noise
            z = np.concatenate(z)
            assert abs(np.sqrt(np.mean(z**2)) - 1) < 5 / np.sqrt(2 * z.size), name
        for issue in batch.rejected:
            rejected_all[issue.isotherm].add(issue.code)
        if name.startswith("b02"):
            assert len(batch.mixtures) == len(truth["campaign"]["mixtures"])
            assert batch.conditions.desorption_pressure_pa == pytest.approx(1e4)
    flagged = {i for i, b in bad.items() if b["expected"] == "accepted_flagged"}
    assert set(accepted_all) == set(good) | flagged
    for iso_id in flagged:
        assert bad[iso_id]["code"] in accepted_all[iso_id].flags, iso_id
    assert set(rejected_all) == set(bad) - flagged
    for iso_id, codes in rejected_all.items():
        assert bad[iso_id]["code"] in codes, (iso_id, codes)
