"""Intake: formats, unit normalisation and every validation rule.

The isotherm values here are invented (truth-known synthetic data); unit
factors are checked against scipy.constants, saturation pressures against
CoolProp.
"""
import io
import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from CoolProp.CoolProp import PropsSI
from scipy import constants

from sorbrank.worker.intake import Limits, read_batch
from sorbrank.worker.isotherm import IntakeError
from sorbrank.worker.units import MOLAR_VOLUME_STP_CM3_PER_MOL

HEADER = "sorbent_id,adsorbate,temperature_k,pressure,loading"
UNITS = "# units: pressure:kPa,loading:mmol/g\n"


def csv_of(*rows, header=HEADER, units=UNITS):
    return units + header + "\n" + "\n".join(rows) + "\n"


def good_rows(sorbent="m1", adsorbate="CO2", t="298.15", extra=""):
    return [f"{sorbent},{adsorbate},{t},{p},{q}{extra}"
            for p, q in ((10, 0.5), (50, 1.5), (100, 2.0), (200, 2.5))]


def only_issue(batch):
    assert batch.isotherms == []
    assert len(batch.rejected) == 1, [str(i) for i in batch.rejected]
    return batch.rejected[0]


# --- reading and normalising ------------------------------------------------

def test_csv_is_normalised_to_canonical_units_and_sorted():
    rows = ["m1,CO2,298.15,100,2.0", "m1,CO2,298.15,10,0.5", "m1,CO2,298.15,50,1.5"]
    batch = read_batch(csv_of(*rows), batch_label="b1")
    assert batch.rejected == []
    (iso,) = batch.isotherms
    np.testing.assert_array_equal(iso.pressure_pa, [1e4, 5e4, 1e5])
    np.testing.assert_array_equal(iso.loading_mol_per_kg, [0.5, 1.5, 2.0])
    assert (iso.sorbent_id, iso.adsorbate, iso.temperature_k, iso.branch) == ("m1", "CO2", 298.15, "adsorption")
    assert iso.batch_label == "b1"
    assert iso.isotherm_id.startswith("m1|CO2|298.15K|adsorption|")
    # CO2 at 298.15 K is below its critical temperature: p0 from the shipped table, which
    # reproduces CoolProp to 1e-7 in p0 (worker/saturation_table.py)
    assert iso.saturation_pressure_pa == pytest.approx(PropsSI("P", "T", 298.15, "Q", 0, "CO2"), rel=1e-6)
    assert iso.flags == []
    assert iso.original["rows"].tolist() == [1, 2, 3]
    assert iso.original["pressure"].tolist() == [100.0, 10.0, 50.0]
    assert iso.original["units"] == {"pressure": "kPa", "loading": "mmol/g"}


def test_derived_id_is_stable_and_content_dependent():
    a = read_batch(csv_of(*good_rows())).isotherms[0].isotherm_id
    b = read_batch(csv_of(*reversed(good_rows()))).isotherms[0].isotherm_id
    c = read_batch(csv_of(*good_rows()[:3], "m1,CO2,298.15,200,2.6")).isotherms[0].isotherm_id
    assert a == b != c


def test_supercritical_isotherm_has_no_saturation_pressure():
    batch = read_batch(csv_of(*good_rows(adsorbate="CH4", t="298.15")))
    assert batch.isotherms[0].saturation_pressure_pa is None


@pytest.mark.parametrize("unit, factor_pa", [
    ("atm", constants.atm), ("torr", constants.torr), ("psi", constants.psi),
    ("bar", constants.bar), ("mmHg", constants.mmHg), ("MPa", 1e6), ("mbar", 100.0),
])
def test_pressure_unit_declared(unit, factor_pa):
    # scipy.constants (SI definitions) as the reference factors
    rows = [f"m1,CH4,298.15,{p},{q}" for p, q in ((1, 0.5), (2, 1.0), (3, 1.2))]
    batch = read_batch(csv_of(*rows, units=f"# units: pressure:{unit},loading:mol/kg\n"))
    np.testing.assert_allclose(batch.isotherms[0].pressure_pa, np.array([1, 2, 3]) * factor_pa, rtol=1e-15)


def test_relative_pressure_uses_computed_saturation_pressure():
    rows = [f"m1,nitrogen,77.355,{x},{q}" for x, q in ((0.05, 1.0), (0.1, 1.2), (0.2, 1.4))]
    batch = read_batch(csv_of(*rows, units="# units: pressure:p/p0,loading:mmol/g\n"))
    (iso,) = batch.isotherms
    p0 = PropsSI("P", "T", 77.355, "Q", 0, "Nitrogen")  # CoolProp reference
    # the shipped saturation table reproduces CoolProp to 1e-7 in p0
    np.testing.assert_allclose(iso.pressure_pa, np.array([0.05, 0.1, 0.2]) * p0, rtol=1e-6)
    np.testing.assert_allclose(iso.relative_pressure, [0.05, 0.1, 0.2], rtol=1e-12)
    assert iso.adsorbate == "N2"


def test_relative_pressure_with_given_saturation_pressure_in_pa():
    rows = [f"m1,CO2,195,{x},{q},150000" for x, q in ((0.1, 1.0), (0.2, 1.2), (0.5, 1.4))]
    batch = read_batch(csv_of(*rows, header=HEADER + ",saturation_pressure_pa",
                              units="# units: pressure:relative,loading:mmol/g\n"))
    np.testing.assert_allclose(batch.isotherms[0].pressure_pa, [15000, 30000, 75000])
    assert batch.isotherms[0].saturation_pressure_pa == 150000


def test_relative_pressure_plain_saturation_pressure_needs_its_unit():
    rows = [f"m1,CO2,195,{x},{q},150" for x, q in ((0.1, 1.0), (0.2, 1.2), (0.5, 1.4))]
    text = csv_of(*rows, header=HEADER + ",saturation_pressure",
                  units="# units: pressure:relative,loading:mmol/g\n")
    issue = only_issue(read_batch(text))
    assert (issue.code, issue.field, issue.row) == ("missing_unit", "saturation_pressure", None)
    declared = text.replace("loading:mmol/g", "loading:mmol/g,saturation_pressure:kPa")
    assert read_batch(declared).isotherms[0].saturation_pressure_pa == 150000


def test_plain_saturation_pressure_is_in_the_pressure_unit():
    rows = [f"m1,CO2,273.15,{p},{q},3485" for p, q in ((10, 1.0), (20, 1.2), (50, 1.4))]
    batch = read_batch(csv_of(*rows, header=HEADER + ",saturation_pressure"))
    assert batch.isotherms[0].saturation_pressure_pa == 3485e3


def test_absolute_loading_with_sample_mass_and_gas_volume():
    rows = [f"m1,N2,77,{p},{v}" for p, v in ((1, 22.4), (2, 33.6), (3, 44.8))]
    text = csv_of(*rows, units="# units: pressure:kPa,loading:cm3(STP)\n")
    batch = read_batch(text, sample_mass_g="0.5")
    expected = np.array([22.4, 33.6, 44.8]) / MOLAR_VOLUME_STP_CM3_PER_MOL / 0.5e-3
    np.testing.assert_allclose(batch.isotherms[0].loading_mol_per_kg, expected, rtol=1e-14)


def test_converted_values_are_correctly_rounded_where_the_conversion_is_a_power_of_ten():
    from fractions import Fraction

    # the reference is exact rational arithmetic (float(Fraction) rounds correctly):
    # kPa -> Pa is x 1000, mmol on a sample of 0.37 g -> mol/kg is / 0.37, each the
    # double nearest the exact result (so 0.0031 stays 0.0031, never 0.0031000000000000003)
    pressures_kpa = ["0.0031", "0.1235709", "1.546324", "12.7", "99.99"]
    amounts_mmol = ["0.0031", "0.05677142", "0.06517968", "1.2", "3.3"]
    rows = [f"m1,CO2,298.15,{p},{q},0.37,{q}" for p, q in zip(pressures_kpa, amounts_mmol)]
    header = HEADER + ",sample_mass_g,loading_sigma"
    (iso,) = read_batch(csv_of(*rows, header=header,
                               units="# units: pressure:kPa,loading:mmol\n")).isotherms
    assert iso.pressure_pa.tolist() == [float(Fraction(float(p)) * 1000) for p in pressures_kpa]
    exact = [float(Fraction(float(q)) / Fraction(0.37)) for q in amounts_mmol]
    assert iso.loading_mol_per_kg.tolist() == exact and iso.sigma_mol_per_kg.tolist() == exact


def test_sigma_is_converted_with_the_loading():
    rows = [f"m1,CO2,298.15,{p},{q},{s}" for p, q, s in ((10, 44.0, 0.44), (20, 88.0, 0.88), (30, 99.0, 1.0))]
    batch = read_batch(csv_of(*rows, header=HEADER + ",loading_sigma", units="# units: pressure:kPa,loading:mg/g\n"))
    iso = batch.isotherms[0]
    np.testing.assert_allclose(iso.sigma_mol_per_kg, iso.loading_mol_per_kg / 100 * np.array([1, 1, 99 / 99.0 * 100 / 99]),
                               rtol=1e-12)


def test_grouping_by_isotherm_id_and_branches():
    rows = [f"{i},m1,CO2,298.15,{p},{q},{b}" for i, b in (("ads1", "adsorption"), ("des1", "Desorption"))
            for p, q in ((10, 0.5), (20, 0.9), (30, 1.2))]
    batch = read_batch(csv_of(*rows, header="isotherm_id," + HEADER + ",branch"))
    assert [(i.isotherm_id, i.branch) for i in batch.isotherms] == [("ads1", "adsorption"), ("des1", "desorption")]


def test_settings_precedence_column_over_file_over_argument():
    rows = [f"m1,CH4,298.15,{p},{q}" for p, q in ((1, 0.5), (2, 1.0), (3, 1.2))]
    body = "\n".join(rows) + "\n"
    column = "# units: pressure:kPa\n# batch_label: f\n" + HEADER.replace("pressure,", "pressure_bar,") + "\n" + body
    batch = read_batch(column, units={"pressure": "Pa", "loading": "mol/kg"})
    np.testing.assert_allclose(batch.isotherms[0].pressure_pa, [1e5, 2e5, 3e5])     # the column's bar
    assert batch.label == "f"
    file_level = "# units: pressure:kPa\n" + HEADER + "\n" + body
    batch = read_batch(file_level, units="pressure:Pa,loading:mol/kg")
    np.testing.assert_allclose(batch.isotherms[0].pressure_pa, [1e3, 2e3, 3e3])     # the file's kPa
    np.testing.assert_allclose(batch.isotherms[0].loading_mol_per_kg, [0.5, 1.0, 1.2])  # the argument's
    assert read_batch(column, batch_label="arg", units="loading:mol/kg").label == "arg"


def test_label_defaults_to_content_hash():
    text = csv_of(*good_rows())
    label = read_batch(text).label
    assert label.startswith("batch-") and len(label) == 18
    assert read_batch(text).label == label


# --- the same data through three formats ------------------------------------

def _same_data_three_ways(tmp_path):
    points = {"iso-a": ([1, 10, 100, 10], [0.1, 0.9, 2.5, 1.0]), "iso-b": ([5, 50, 500], [0.2, 1.0, 1.9])}
    csv_rows = [f"{iid},mat-{iid[-1]},nitrogen,77,{p},{q}" for iid, (ps, qs) in points.items()
                for p, q in zip(ps, qs)]
    csv_text = "# units: pressure:torr,loading:cm3(STP)/g\n# batch_label: same\n" \
               "isotherm_id,sorbent_id,adsorbate,temperature_k,pressure,loading\n" + "\n".join(csv_rows)
    doc = {"batch_label": "same", "units": {"pressure": "torr", "loading": "cm3(STP)/g"},
           "isotherms": [{"isotherm_id": iid, "sorbent_id": f"mat-{iid[-1]}", "adsorbate": "nitrogen",
                          "temperature_k": 77, "pressure": ps, "loading": qs}
                         for iid, (ps, qs) in points.items()]}
    table = pa.table({
        "isotherm_id": [iid for iid, (ps, _) in points.items() for _ in ps],
        "sorbent_id": [f"mat-{iid[-1]}" for iid, (ps, _) in points.items() for _ in ps],
        "adsorbate": ["nitrogen"] * 7,
        "temperature_k": [77] * 7,
        "pressure": [float(p) for ps, _ in points.values() for p in ps],
        "loading": [q for _, qs in points.values() for q in qs],
    }).replace_schema_metadata({"units": "pressure:torr,loading:cm3(STP)/g", "batch_label": "same"})
    path = tmp_path / "same.parquet"
    pq.write_table(table, path)
    return csv_text, json.dumps(doc), path


def test_csv_json_parquet_give_identical_isotherms(tmp_path):
    csv_text, json_text, parquet_path = _same_data_three_ways(tmp_path)
    batches = [read_batch(csv_text), read_batch(json_text), read_batch(parquet_path),
               read_batch(parquet_path.read_bytes())]
    reference = batches[0]
    assert [i.isotherm_id for i in reference.isotherms] == ["iso-a", "iso-b"]
    assert reference.isotherms[0].n_points == 4 and reference.isotherms[0].flags == []  # replicate kept
    for batch in batches[1:]:
        assert batch.label == "same" and batch.rejected == []
        for a, b in zip(reference.isotherms, batch.isotherms, strict=True):
            for name in ("isotherm_id", "sorbent_id", "adsorbate", "temperature_k", "branch",
                         "saturation_pressure_pa", "surface_area_m2_per_g", "flags", "batch_label"):
                assert getattr(a, name) == getattr(b, name), name
            np.testing.assert_array_equal(a.pressure_pa, b.pressure_pa)
            np.testing.assert_array_equal(a.loading_mol_per_kg, b.loading_mol_per_kg)


def test_json_conditions_and_mixtures_are_canonical():
    doc = {"units": {"pressure": "bar", "loading": "mmol/g"},
           "isotherms": [{"sorbent_id": "m", "adsorbate": "CO2", "temperature_k": 298,
                          "pressure": [0.1, 0.5, 1.0], "loading": [1, 2, 3]}],
           "conditions": {"adsorption_pressure_kpa": 100, "desorption_pressure_kpa": 10,
                          "reference_pressures_kpa": [15, 100], "adsorption_temperature_k": 298},
           "mixtures": [{"components": ["carbon dioxide", "N2"], "mole_fractions": [0.15, 0.85],
                         "total_pressure": 1, "temperature_k": 298}]}
    batch = read_batch(json.dumps(doc))
    c = batch.conditions
    assert (c.adsorption_pressure_pa, c.desorption_pressure_pa, c.reference_pressures_pa) == (1e5, 1e4, (1.5e4, 1e5))
    assert c.adsorption_temperature_k == 298 and c.desorption_temperature_k is None
    (m,) = batch.mixtures
    assert (m.components, m.mole_fractions, m.total_pressure_pa, m.temperature_k, m.sorbent_id) == \
        (["CO2", "N2"], [0.15, 0.85], 1e5, 298, None)


@pytest.mark.parametrize("mixture, field", [
    ({"components": ["CO2"], "mole_fractions": [1.0]}, "mixtures[0].components"),
    ({"components": ["CO2", "N2"], "mole_fractions": [0.2, 0.7]}, "mixtures[0].mole_fractions"),
    ({"components": ["CO2", "N3"], "mole_fractions": [0.2, 0.8]}, "mixtures[0].components"),
    ({"components": ["CO2", "N2"], "mole_fractions": [0.2, 0.8], "total_pressure": -1}, "mixtures[0].total_pressure"),
    ({"components": ["CO2", "N2"], "mole_fractions": [0.2, 0.8], "colour": 1}, "mixtures[0]"),
    ({"components": ["CO2", "N2"], "mole_fractions": [0.2, 0.8], "total_pressure_relative": 1},
     "mixtures[0].total_pressure_relative"),
])
def test_bad_mixture_is_a_batch_error(mixture, field):
    base = {"total_pressure_bar": 1, "temperature_k": 298}
    if "total_pressure" in mixture or "total_pressure_relative" in mixture:
        base.pop("total_pressure_bar")
    doc = {"units": {"pressure": "bar", "loading": "mmol/g"},
           "isotherms": [{"sorbent_id": "m", "adsorbate": "CO2", "temperature_k": 298,
                          "pressure": [0.1, 0.5, 1.0], "loading": [1, 2, 3]}],
           "mixtures": [{**base, **mixture}]}
    with pytest.raises(IntakeError) as err:
        read_batch(json.dumps(doc), batch_label="mx")
    (issue,) = err.value.issues
    assert (issue.code, issue.field, issue.batch) == ("invalid_mixture", field, "mx")


# --- per-isotherm rules -------------------------------------------------------

@pytest.mark.parametrize("bad_row, row, field, code, text", [
    ("m1,CO2,298.15,,2.5", 4, "pressure", "missing_value", "'pressure' is missing"),
    ("m1,CO2,298.15,abc,2.5", 4, "pressure", "not_a_number", "value 'abc' is not a number"),
    ("m1,CO2,298.15,200,NaN", 4, "loading", "not_finite", "value 'NaN' is not finite"),
    ("m1,CO2,298.15,200,-inf", 4, "loading", "not_finite", "value '-inf' is not finite"),
    ("m1,CO2,298.15,1e999,2.5", 4, "pressure", "not_finite", "value '1e999' is not finite"),
    ("m1,CO2,298.15,-200,2.5", 4, "pressure", "negative_value", "value '-200' is negative"),
    ("m1,CO2,298.15,200,-2.5", 4, "loading", "negative_value", "value '-2.5' is negative"),
])
def test_bad_point_rejects_isotherm_with_exact_issue(bad_row, row, field, code, text):
    batch = read_batch(csv_of(*good_rows()[:3], bad_row), batch_label="b")
    issue = only_issue(batch)
    assert (issue.batch, issue.row, issue.field, issue.code) == ("b", row, field, code)
    assert issue.isotherm == "m1|CO2|298.15K|adsorption (from row 1)"
    assert issue.message == (f"batch 'b', isotherm 'm1|CO2|298.15K|adsorption (from row 1)', "
                             f"row {row}, field '{field}': {text}" + issue.message.split(text, 1)[1])


@pytest.mark.parametrize("t, code", [("0", "non_positive_value"), ("-10", "non_positive_value"),
                                     ("", "missing_value"), ("warm", "not_a_number")])
def test_bad_temperature(t, code):
    issues = read_batch(csv_of(*good_rows(t=t)), batch_label="b").rejected
    assert {(i.code, i.field) for i in issues} == {(code, "temperature_k")}
    assert [i.row for i in issues] == [1, 2, 3, 4]


def test_unknown_adsorbate_suggests_name_once_per_isotherm():
    issue = only_issue(read_batch(csv_of(*good_rows(adsorbate="nitrogn")), batch_label="b"))
    assert (issue.code, issue.field, issue.row) == ("unknown_adsorbate", "adsorbate", 1)
    assert issue.message.endswith("unknown adsorbate 'nitrogn'; did you mean 'nitrogen'?")


def test_unknown_unit_suggests_name():
    issue = batch_error(csv_of(*good_rows(), units="# units: pressure:kpaa,loading:mmol/g\n"),
                        batch_label="b")
    assert (issue.code, issue.field) == ("unknown_unit", "units")
    assert issue.message.endswith("unknown pressure unit 'kpaa'; did you mean 'kPa'?")


def test_unknown_unit_token_in_column_name_suggests_column():
    issue = batch_error(csv_of(*good_rows(), header=HEADER.replace("pressure,", "pressure_kpaa,")))
    assert (issue.code, issue.field) == ("unknown_unit", "pressure_kpaa")
    assert "did you mean 'pressure_kpa'?" in issue.message


def test_missing_unit_is_rejected_not_guessed():
    issue = only_issue(read_batch(csv_of(*good_rows(), units="# units: loading:mol/kg\n"), batch_label="b"))
    assert (issue.code, issue.field, issue.row) == ("missing_unit", "pressure", None)
    assert "pressure_kpa" in issue.message and "# units: pressure:kPa" in issue.message


def test_relative_pressure_above_one():
    rows = [f"m1,N2,77,{x},{q}" for x, q in ((0.1, 1.0), (0.5, 1.2), (1.02, 1.4))]
    issue = only_issue(read_batch(csv_of(*rows, units="# units: pressure:p/p0,loading:mmol/g\n")))
    assert (issue.code, issue.field, issue.row) == ("relative_pressure_above_one", "pressure", 3)


def test_relative_pressure_without_any_saturation_pressure():
    rows = [f"m1,CH4,298.15,{x},{q}" for x, q in ((0.1, 1.0), (0.5, 1.2), (0.9, 1.4))]
    issue = only_issue(read_batch(csv_of(*rows, units="# units: pressure:p/p0,loading:mmol/g\n")))
    assert (issue.code, issue.field, issue.row) == ("missing_saturation_pressure", "saturation_pressure", None)
    assert "CH4 at 298.15 K" in issue.message


def test_absolute_loading_without_sample_mass():
    issue = only_issue(read_batch(csv_of(*good_rows(), units="# units: pressure:kPa,loading:mmol\n")))
    assert (issue.code, issue.field, issue.row) == ("missing_sample_mass", "sample_mass_g", None)


def test_too_few_distinct_pressures_counts_replicates_once():
    rows = ["m1,CO2,298.15,10,0.5", "m1,CO2,298.15,10,0.6", "m1,CO2,298.15,20,0.9"]
    issue = only_issue(read_batch(csv_of(*rows)))
    assert (issue.code, issue.row, issue.field) == ("too_few_points", None, None)
    assert issue.message.endswith("2 distinct pressure(s); at least 3 are needed")


def test_replicate_pressures_are_all_kept_in_input_order():
    rows = ["m1,CO2,298.15,20,0.9", "m1,CO2,298.15,10,0.7", "m1,CO2,298.15,30,1.1", "m1,CO2,298.15,10,0.5"]
    (iso,) = read_batch(csv_of(*rows)).isotherms
    np.testing.assert_array_equal(iso.pressure_pa, [1e4, 1e4, 2e4, 3e4])
    np.testing.assert_array_equal(iso.loading_mol_per_kg, [0.7, 0.5, 0.9, 1.1])
    assert iso.flags == []   # a replicate 0.2 below its sibling is no fall in loading
    assert iso.original["loading"].tolist() == [0.9, 0.7, 1.1, 0.5]


def test_replicate_pressures_keep_their_own_sigma():
    rows = ["m1,CO2,298.15,10,0.5,0.03", "m1,CO2,298.15,10,0.7,0.04", "m1,CO2,298.15,20,0.9,0.05",
            "m1,CO2,298.15,30,1.1,0.05"]
    (iso,) = read_batch(csv_of(*rows, header=HEADER + ",loading_sigma")).isotherms
    np.testing.assert_allclose(iso.sigma_mol_per_kg, [0.03, 0.04, 0.05, 0.05], rtol=1e-12)


def test_a_fall_below_a_replicate_at_lower_pressure_is_still_flagged():
    rows = ["m1,CO2,298.15,10,0.5", "m1,CO2,298.15,10,1.0", "m1,CO2,298.15,20,0.8", "m1,CO2,298.15,30,1.1"]
    (iso,) = read_batch(csv_of(*rows)).isotherms
    assert iso.flags == ["non_monotonic_loading"]


def test_sigma_column_with_its_own_unit():
    rows = [f"m1,CO2,298.15,{p},{q},{s}" for p, q, s in ((10, 1.0, 10), (20, 2.0, 20), (30, 3.0, 30))]
    iso = read_batch(csv_of(*rows, header=HEADER + ",loading_sigma_mg_per_g")).isotherms[0]
    co2_g_per_mol = 44.009  # CIAAW atomic weights C 12.011 + 2 x O 15.999 (from memory)
    np.testing.assert_allclose(iso.sigma_mol_per_kg, np.array([10, 20, 30]) / co2_g_per_mol, rtol=1e-4)


def test_same_unit_in_different_spelling_is_one_unit():
    for spelling in ("kPa", "KPA", "kilopascal", "kpa"):
        text = csv_of(*good_rows(), units=f"# units: pressure:{spelling},loading:mmol/g\n")
        np.testing.assert_array_equal(read_batch(text).isotherms[0].pressure_pa, [1e4, 5e4, 1e5, 2e5])


def test_inconsistent_isotherm_level_value():
    rows = [r + m for r, m in zip(good_rows(), (",1.0", ",1.0", ",1.1", ",1.0"))]
    issue = only_issue(read_batch(csv_of(*rows, header=HEADER + ",sample_mass_g")))
    assert (issue.code, issue.field) == ("inconsistent_value", "sample_mass_g")


def test_too_many_points():
    issue = only_issue(read_batch(csv_of(*good_rows()), limits=Limits(max_points_per_isotherm=3)))
    assert (issue.code, issue.field, issue.row) == ("too_many_points", None, None)
    assert issue.message.endswith("4 points, limit 3")


@pytest.mark.parametrize("sorbent, reason", [
    ("a/b", "contains a path separator"), ("a\\b", "contains a path separator"),
    ("..", "is a relative path name"), ("x" * 201, "is longer than 200 characters"),
    ("a\x07b", "contains a control character"),
])
def test_invalid_sorbent_id(sorbent, reason):
    issue = only_issue(read_batch(csv_of(*good_rows(sorbent=sorbent))))
    assert (issue.code, issue.field, issue.row) == ("invalid_id", "sorbent_id", 1)
    assert issue.message.endswith(reason)


def test_invalid_isotherm_id():
    rows = [f"../etc,{r}" for r in good_rows()]
    issue = only_issue(read_batch(csv_of(*rows, header="isotherm_id," + HEADER)))
    assert (issue.code, issue.field) == ("invalid_id", "isotherm_id")


def test_unknown_branch():
    issue = only_issue(read_batch(csv_of(*good_rows(extra=",upwards"), header=HEADER + ",branch")))
    assert (issue.code, issue.field, issue.row) == ("unknown_branch", "branch", 1)


def test_non_monotonic_loading_is_accepted_with_flag():
    # the third point falls 20 % below the second: beyond the 2 % allowance
    rows = ["m1,CO2,298.15,10,1.0", "m1,CO2,298.15,20,2.0", "m1,CO2,298.15,30,1.6", "m1,CO2,298.15,40,2.1"]
    (iso,) = read_batch(csv_of(*rows)).isotherms
    assert iso.flags == ["non_monotonic_loading"]
    # a 1 % dip is noise
    rows[2] = "m1,CO2,298.15,30,1.98"
    assert read_batch(csv_of(*rows)).isotherms[0].flags == []


def test_non_monotonic_allowance_widens_with_sigma():
    rows = ["m1,CO2,298.15,10,1.0,0.2", "m1,CO2,298.15,20,2.0,0.2", "m1,CO2,298.15,30,1.6,0.2",
            "m1,CO2,298.15,40,2.1,0.2"]
    assert read_batch(csv_of(*rows, header=HEADER + ",loading_sigma")).isotherms[0].flags == []


def test_pressure_above_saturation_is_flagged():
    rows = [f"m1,N2,77,{p},{q}" for p, q in ((10, 1.0), (50, 1.5), (120, 9.0))]
    (iso,) = read_batch(csv_of(*rows)).isotherms
    assert iso.flags == ["pressure_above_saturation"]


def test_mixed_batch_keeps_every_good_isotherm():
    rows = (good_rows("good1") + ["bad1,CO2,298.15,10,x"] + good_rows("bad1")[1:] + good_rows("good2")
            + good_rows("bad2", adsorbate="argn") + good_rows("good3", t="273.15"))
    batch = read_batch(csv_of(*rows), batch_label="mix")
    assert [i.sorbent_id for i in batch.isotherms] == ["good1", "good2", "good3"]
    assert [i.code for i in batch.rejected] == ["not_a_number", "unknown_adsorbate"]
    assert batch.rejected_isotherms == ["bad1|CO2|298.15K|adsorption (from row 5)",
                                        "bad2|argn|298.15K|adsorption (from row 13)"]


def test_all_problems_of_one_isotherm_are_reported_and_capped():
    rows = [f"m1,CO2,298.15,x{i},-1" for i in range(40)]
    issues = read_batch(csv_of(*rows)).rejected
    assert len(issues) == 26
    assert issues[-1].code == "more_issues"
    assert issues[-1].message.endswith("55 more issue(s) not listed")  # 80 problems, 25 listed


# --- JSON specifics -----------------------------------------------------------

def json_doc(*isotherms, **top):
    return json.dumps({"units": {"pressure": "kPa", "loading": "mmol/g"},
                       "isotherms": list(isotherms), **top})


def iso_obj(**changes):
    return {"sorbent_id": "m1", "adsorbate": "CO2", "temperature_k": 298.15,
            "pressure": [10, 50, 100], "loading": [0.5, 1.5, 2.0], **changes}


def test_json_rows_are_point_indices_and_isotherms_named():
    text = json_doc(iso_obj(), iso_obj(loading=[0.5, "x", 2.0]), iso_obj(isotherm_id="named", pressure=[1, 2, -3]))
    batch = read_batch(text, batch_label="j")
    assert len(batch.isotherms) == 1
    assert [(i.isotherm, i.row, i.field, i.code) for i in batch.rejected] == [
        ("isotherms[1]", 1, "loading", "not_a_number"), ("named", 2, "pressure", "negative_value")]
    assert batch.rejected[0].message == \
        "batch 'j', isotherm 'isotherms[1]', row 1, field 'loading': value '\"x\"' is not a number"


def test_json_nan_and_infinity_tokens():
    text = json_doc(iso_obj()).replace("[0.5, 1.5, 2.0]", "[0.5, NaN, Infinity]")
    issues = read_batch(text).rejected
    assert [(i.row, i.code) for i in issues] == [(1, "not_finite"), (2, "not_finite")]


def test_json_isotherm_level_issue_has_no_row():
    issue = only_issue(read_batch(json_doc(iso_obj(temperature_k=-1))))
    assert (issue.row, issue.field, issue.code) == (None, "temperature_k", "non_positive_value")


@pytest.mark.parametrize("changes, field, code", [
    ({"loading": [1, 2]}, "loading", "length_mismatch"),
    ({"pressure": None}, "pressure", "missing_value"),
    ({"pressure": "1,2,3"}, "pressure", "wrong_type"),
    ({"sorbent_id": ["m"]}, "sorbent_id", "wrong_type"),
    ({"adsorbate": None}, "adsorbate", "missing_value"),
    ({"temperature_k": True}, "temperature_k", "not_a_number"),
    ({"temperature_k": 10 ** 400}, "temperature_k", "not_finite"),
])
def test_json_structural_problems(changes, field, code):
    issues = read_batch(json_doc(iso_obj(**changes))).rejected
    assert (issues[0].field, issues[0].code) == (field, code)


def test_json_duplicate_isotherm_id():
    batch = read_batch(json_doc(iso_obj(isotherm_id="a"), iso_obj(isotherm_id="a", loading=[1, 2, 3])))
    assert [i.isotherm_id for i in batch.isotherms] == ["a"]
    assert [(i.code, i.field) for i in batch.rejected] == [("duplicate_isotherm_id", "isotherm_id")]


def test_json_element_that_is_not_an_object():
    batch = read_batch(json_doc(iso_obj(), 42))
    assert len(batch.isotherms) == 1
    assert [(i.isotherm, i.code) for i in batch.rejected] == [("isotherms[1]", "wrong_type")]


# --- whole-input errors ------------------------------------------------------

def batch_error(source, **kw):
    with pytest.raises(IntakeError) as err:
        read_batch(source, **kw)
    assert len(err.value.issues) == 1
    return err.value.issues[0]


def test_missing_required_column_names_it_with_hint():
    issue = batch_error("sorbent_id,adsorbate,temperature,pressure,loading\nm,CO2,1,2,3\n")
    assert (issue.code, issue.field) == ("missing_column", "temperature_k")
    assert "'temperature_k' (found 'temperature')" in issue.message


@pytest.mark.parametrize("source, code", [
    (b"sorbent_id,adsorbate\xff,temperature_k,pressure,loading\n", "not_utf8"),
    ("", "no_data"),
    (HEADER + "\n", "no_data"),
    (HEADER + "\nm,CO2,298,1,2\nm,CO2,298,1\n", "malformed_row"),
    (HEADER + ",pressure\nm,CO2,298,1,2,3\n", "duplicate_column"),
    ("{not json", "unparseable"),
    ("[1, 2]", "missing_column"),          # not "{": read as CSV
    ('{"isotherms": {}}', "wrong_type"),
    ('{"isotherms": [], "extra": 1}', "unknown_field"),
    ('{"isotherms": []}', "no_data"),
    ("{" + '"a": [' * 100 + "]" * 100 + "}", "too_deeply_nested"),
    (b"PAR1 not really parquet", "unparseable"),
    (12345, "unsupported_source"),
])
def test_unreadable_inputs(source, code):
    assert batch_error(source).code == code


def test_json_top_level_must_be_an_object():
    assert batch_error("[1, 2]", fmt="json").code == "wrong_type"


def test_malformed_row_is_located():
    issue = batch_error(HEADER + "\nm,CO2,298,1,2\n\n  \nm,CO2,298,1\n")
    assert issue.message.endswith("data row 2 has 4 fields where the header has 5: 'm,CO2,298,1'")


def test_batch_limits():
    text = csv_of(*good_rows("a"), *good_rows("b"), *good_rows("c"))
    assert batch_error(text, limits=Limits(max_isotherms=2)).code == "too_many_isotherms"
    assert batch_error(text, limits=Limits(max_bytes=100)).code == "input_too_large"
    wide = ",".join(f"c{i}" for i in range(70)) + "," + HEADER + "\n"
    assert batch_error(wide).code == "too_many_columns"


@pytest.mark.parametrize("kwargs, code, field", [
    ({"units": "presure:kPa"}, "invalid_setting", "units"),
    ({"units": {"pressure": "kpaa"}}, "unknown_unit", "units"),
    ({"units": "pressure kPa"}, "invalid_setting", "units"),
    ({"sample_mass_g": "heavy"}, "invalid_setting", "sample_mass_g"),
    ({"batch_label": "a/b"}, "invalid_batch_label", None),
    ({"delimiter": "|"}, "invalid_setting", "delimiter"),
    ({"decimal": ",", "delimiter": ","}, "invalid_setting", "decimal"),
    ({"gases": [{"name": "X"}]}, "invalid_gas", "gases[0]"),
])
def test_bad_batch_settings(kwargs, code, field):
    issue = batch_error(csv_of(*good_rows()), **kwargs)
    assert (issue.code, issue.field) == (code, field)


def test_path_source_and_format_inference(tmp_path):
    path = tmp_path / "x.csv"
    path.write_text(csv_of(*good_rows()))
    assert len(read_batch(path).isotherms) == 1
    assert batch_error(tmp_path / "missing.csv").code == "unreadable_file"
    assert batch_error(csv_of(*good_rows()), fmt="xml").code == "unknown_format"
    assert len(read_batch(csv_of(*good_rows()).encode(), fmt="csv").isotherms) == 1


def test_parquet_typed_columns_and_nulls():
    table = pa.table({"sorbent_id": ["m"] * 4, "adsorbate": ["CO2"] * 4, "temperature_k": [298.15] * 4,
                      "pressure": [10.0, None, 30.0, 40.0], "loading": [1, 2, 3, 4]})
    buf = io.BytesIO()
    pq.write_table(table.replace_schema_metadata({"units": "pressure:kPa,loading:mmol/g"}), buf)
    issue = only_issue(read_batch(buf.getvalue()))
    assert (issue.code, issue.row, issue.field) == ("missing_value", 2, "pressure")


# --- the units declaration, wherever it is given -------------------------------

POINTS_BAR = ([0.1, 0.5, 1.0, 2.0], [20.0, 45.0, 60.0, 70.0])   # bar, cm3(STP)/g


def _columns(p_col="pressure", q_col="loading"):
    ps, qs = POINTS_BAR
    return {"sorbent_id": ["m1"] * 4, "adsorbate": ["N2"] * 4, "temperature_k": [77.35] * 4,
            p_col: ps, q_col: qs}


def _same_isotherm_every_way():
    """One isotherm, its units given in every place intake reads them."""
    ps, qs = POINTS_BAR
    plain = HEADER + "\n" + "\n".join(f"m1,N2,77.35,{p},{q}" for p, q in zip(ps, qs)) + "\n"
    obj = {"sorbent_id": "m1", "adsorbate": "N2", "temperature_k": 77.35, "pressure": ps, "loading": qs}
    declared = {"pressure": "bar", "loading": "cm3(STP)/g"}

    def parquet(table):
        buf = io.BytesIO()
        pq.write_table(table, buf)
        return buf.getvalue()

    return {
        "column names": read_batch(plain.replace("pressure,loading", "pressure_bar,loading_cm3stp_per_g")),
        "csv header line": read_batch("# units: pressure:bar,loading:cm3(STP)/g\n" + plain),
        "argument text": read_batch(plain, units="pressure:bar,loading:cm3(STP)/g"),
        "argument mapping": read_batch(plain, units=declared),
        "json top level": read_batch(json.dumps({"units": declared, "isotherms": [obj]})),
        "json top level text": read_batch(json.dumps({"units": "pressure:bar,loading:cm3(STP)/g",
                                                      "isotherms": [obj]})),
        "json isotherm": read_batch(json.dumps({"isotherms": [dict(obj, units=declared)]})),
        "json keys": read_batch(json.dumps({"isotherms": [
            {**{k: v for k, v in obj.items() if k not in ("pressure", "loading")},
             "pressure_bar": ps, "loading_cm3stp_per_g": qs}]})),
        "parquet metadata": read_batch(parquet(pa.table(_columns()).replace_schema_metadata(
            {"units": "pressure:bar,loading:cm3(STP)/g"}))),
        "parquet columns": read_batch(parquet(pa.table(_columns("pressure_bar", "loading_cm3stp_per_g")))),
        "table": read_batch(pa.table(_columns()), units=declared),
        "table columns": read_batch(pa.table(_columns("Pressure_Bar", "loading_cm3stp_per_g"))),
    }


def test_units_declared_anywhere_give_identical_isotherms():
    batches = _same_isotherm_every_way()
    reference = batches["column names"].isotherms[0]
    # 1 bar = 1e5 Pa (scipy.constants.bar); 1 cm3(STP) = 1 / 22413.97 mol (CODATA R)
    np.testing.assert_allclose(reference.pressure_pa, np.array(POINTS_BAR[0]) * constants.bar, rtol=1e-15)
    np.testing.assert_allclose(reference.loading_mol_per_kg,
                               np.array(POINTS_BAR[1]) / MOLAR_VOLUME_STP_CM3_PER_MOL * 1000, rtol=1e-14)
    for where, batch in batches.items():
        assert batch.rejected == [], where
        (iso,) = batch.isotherms
        np.testing.assert_array_equal(iso.pressure_pa, reference.pressure_pa, err_msg=where)
        np.testing.assert_array_equal(iso.loading_mol_per_kg, reference.loading_mol_per_kg, err_msg=where)
        assert iso.saturation_pressure_pa == reference.saturation_pressure_pa, where
        assert iso.original["units"] == {"pressure": "bar", "loading": "cm3(STP)/g"}, where


def test_json_isotherms_may_mix_units_in_one_body():
    doc = {"units": {"pressure": "kPa", "loading": "mmol/g"}, "isotherms": [
        iso_obj(isotherm_id="a"),
        iso_obj(isotherm_id="b", pressure=None, pressure_bar=[0.1, 0.5, 1.0]),
        iso_obj(isotherm_id="c", units="pressure:Pa")]}
    doc["isotherms"][1].pop("pressure")
    a, b, c = read_batch(json.dumps(doc)).isotherms
    np.testing.assert_allclose(a.pressure_pa, [1e4, 5e4, 1e5])
    np.testing.assert_allclose(b.pressure_pa, [1e4, 5e4, 1e5])
    np.testing.assert_allclose(c.pressure_pa, [10, 50, 100])


def test_table_source_rows_and_label():
    table = pa.table(_columns("pressure_kpa", "loading_mmol_per_g"))
    batch = read_batch(table)
    assert batch.label.startswith("batch-") and batch.label == read_batch(table).label
    assert batch.isotherms[0].original["source"] == "table"
    bad = table.set_column(3, "pressure_kpa", pa.array([1.0, None, 3.0, 4.0]))
    issue = only_issue(read_batch(bad))
    assert (issue.row, issue.field, issue.code) == (2, "pressure_kpa", "missing_value")
    assert batch_error(table, fmt="csv").code == "unknown_format"


# --- old spellings and column conflicts ----------------------------------------------

@pytest.mark.parametrize("source, field, new", [
    (csv_of(*good_rows(), header=HEADER.replace("sorbent_id", "material_id")), "material_id", "sorbent_id"),
    (csv_of(*good_rows(extra=",kPa"), header=HEADER + ",pressure_unit"), "pressure_unit", "pressure_kpa"),
    (csv_of(*good_rows(extra=",0.1"), header=HEADER + ",sigma"), "sigma", "loading_sigma"),
    ("# pressure_unit: kPa\n# loading_unit: mmol/g\n" + HEADER + "\nm1,CO2,298,1,2\n", "pressure_unit",
     "# units: pressure:kPa,loading:mmol/g"),
    ('{"defaults": {"pressure_unit": "kPa"}, "isotherms": []}', "defaults", "'units'"),
])
def test_old_spellings_are_refused_naming_the_new(source, field, new):
    issue = batch_error(source)
    assert (issue.code, issue.field) == ("old_spelling", field)
    assert "no longer read" in issue.message and new in issue.message


def test_old_spellings_in_json_isotherms_and_conditions():
    issue = only_issue(read_batch(json_doc(iso_obj(pressure_unit="kPa"))))
    assert (issue.code, issue.field) == ("old_spelling", "pressure_unit")
    assert "pressure_kpa" in issue.message
    doc = json_doc(iso_obj(), conditions={"pressure_unit": "bar", "adsorption_pressure": 1})
    issue = batch_error(doc)
    assert (issue.code, issue.field) == ("old_spelling", "conditions.pressure_unit")
    assert "adsorption_pressure_kpa" in issue.message


def test_old_query_spelling_as_argument_setting_is_refused():
    with pytest.raises(TypeError):
        read_batch(csv_of(*good_rows()), defaults={"pressure_unit": "kPa"})


@pytest.mark.parametrize("header, field", [
    (HEADER.replace("pressure,", "pressure_kpa,pressure_bar,"), "pressure"),
    (HEADER.replace("pressure,", "pressure,pressure_bar,"), "pressure"),
    (HEADER + ",loading_mol_per_kg", "loading"),
    (HEADER + ",saturation_pressure_pa,saturation_pressure_kpa", "saturation_pressure"),
])
def test_two_columns_for_one_quantity_are_an_error(header, field):
    issue = batch_error(header + "\nm1,CO2,298,1,2,3,4\n")
    assert (issue.code, issue.field) == ("conflicting_columns", field)
    assert "keep one" in issue.message


def test_missing_quantity_column_says_how_to_name_it():
    issue = batch_error("sorbent_id,adsorbate,temperature_k,loading_mol_per_kg\nm,CO2,298,1\n")
    assert (issue.code, issue.field) == ("missing_column", "pressure")
    assert "pressure_kpa" in issue.message


# --- delimiters and decimal commas ----------------------------------------------------

def _body(delimiter, decimal_comma=False):
    rows = [("m1", "CO2", "298.15", "10.5", "0.5"), ("m1", "CO2", "298.15", "50.25", "1.5"),
            ("m1", "CO2", "298.15", "100", "2.125")]
    cells = [[c.replace(".", ",") if decimal_comma else c for c in r] for r in rows]
    header = delimiter.join(["sorbent_id", "adsorbate", "temperature_k", "pressure_kpa",
                             "loading_mmol_per_g"])
    return "\n".join([header] + [delimiter.join(r) for r in cells]) + "\n"


@pytest.mark.parametrize("delimiter, decimal_comma", [(";", False), ("\t", False), (";", True),
                                                      ("\t", True)])
def test_semicolon_and_tab_files_and_decimal_commas_read_as_comma_files(delimiter, decimal_comma):
    reference = read_batch(_body(",")).isotherms[0]
    iso = read_batch(_body(delimiter, decimal_comma)).isotherms[0]
    np.testing.assert_array_equal(iso.pressure_pa, [10500.0, 50250.0, 100000.0])
    np.testing.assert_array_equal(iso.pressure_pa, reference.pressure_pa)
    np.testing.assert_array_equal(iso.loading_mol_per_kg, reference.loading_mol_per_kg)
    assert iso.temperature_k == 298.15
    named = {";": "semicolon", "\t": "tab"}[delimiter]
    again = read_batch(_body(delimiter, decimal_comma), delimiter=named,
                       decimal="comma" if decimal_comma else ".").isotherms[0]
    np.testing.assert_array_equal(again.pressure_pa, reference.pressure_pa)


def test_decimal_comma_in_a_comma_file_is_not_guessed():
    # "1,5" in a comma file is two cells: the row has one field too many
    assert batch_error(_body(",").replace("10.5", "10,5")).code == "malformed_row"


def test_point_in_a_decimal_comma_file_is_not_a_number():
    text = _body(";", decimal_comma=True).replace("50,25", "50.25")
    issue = only_issue(read_batch(text))
    assert (issue.code, issue.row, issue.field) == ("not_a_number", 2, "pressure_kpa")
    assert issue.message.endswith("value '50.25' is not a number (this file's numbers use decimal commas)")


@pytest.mark.parametrize("body, given, saw, expected", [
    (_body(";"), "comma", "semicolon", "the delimiter asked for is a comma (',')"),
    (_body(","), ";", "comma", "the delimiter asked for is a semicolon (';')"),
    (_body(",").replace(",", "|"), None, "'|'", "sorbrank reads comma-, semicolon- or tab-delimited files"),
])
def test_wrong_delimiter_names_what_it_saw_and_what_it_expected(body, given, saw, expected):
    issue = batch_error(body, delimiter=given)
    assert (issue.code, issue.field) == ("wrong_delimiter", "delimiter")
    assert f"it looks {saw}-delimited" in issue.message and expected in issue.message


# --- declared gases --------------------------------------------------------------------

MESH_G_PER_MOL = 48.107   # CH3SH from CIAAW atomic weights C 12.011, H 1.008, S 32.06 (from memory)
MESH_ROWS = [f"m1,methanethiol-x,298.15,{p},{q}" for p, q in ((10, 48.107), (50, 96.214), (100, 144.321))]


@pytest.mark.parametrize("how", ["header", "argument", "json"])
def test_declared_gas_gives_mass_loadings_its_molar_mass(how):
    header = HEADER.replace("loading", "loading_mg_per_g").replace("pressure,", "pressure_kpa,")
    gas = {"name": "methanethiol-x", "molar_mass_g_per_mol": MESH_G_PER_MOL, "critical_temperature_k": 469.9}
    if how == "header":
        batch = read_batch(f"# gas: methanethiol-x, molar_mass_g_per_mol={MESH_G_PER_MOL}, "
                           "critical_temperature_k=469.9\n" + header + "\n" + "\n".join(MESH_ROWS))
    elif how == "argument":
        batch = read_batch(header + "\n" + "\n".join(MESH_ROWS), gases=[gas])
    else:
        batch = read_batch(json.dumps({"gases": [gas], "isotherms": [{
            "sorbent_id": "m1", "adsorbate": "methanethiol-x", "temperature_k": 298.15,
            "pressure_kpa": [10, 50, 100], "loading_mg_per_g": [48.107, 96.214, 144.321]}]}))
    (iso,) = batch.isotherms
    np.testing.assert_allclose(iso.loading_mol_per_kg, [1.0, 2.0, 3.0], rtol=1e-12)
    assert iso.saturation_pressure_pa is None


def test_undeclared_gas_is_unknown_and_declared_gas_needs_p0_for_relative_pressure():
    header = HEADER.replace("pressure,", "pressure_relative,")
    rows = [r.replace(",10,", ",0.1,").replace(",50,", ",0.5,").replace(",100,", ",0.9,") for r in MESH_ROWS]
    text = header + "\n" + "\n".join(rows) + "\n"
    issue = only_issue(read_batch(text, units="loading:mmol/g"))
    assert issue.code == "unknown_adsorbate"
    gas = [{"name": "methanethiol-x", "molar_mass_g_per_mol": MESH_G_PER_MOL}]
    issue = only_issue(read_batch(text, units="loading:mmol/g", gases=gas))
    assert (issue.code, issue.field) == ("missing_saturation_pressure", "saturation_pressure")
    assert "declared gas" in issue.message
    with_p0 = text.replace(header, header + ",saturation_pressure_kpa").replace("\n", ",150\n")
    with_p0 = with_p0.replace(header + ",saturation_pressure_kpa,150", header + ",saturation_pressure_kpa")
    (iso,) = read_batch(with_p0, units="loading:mmol/g", gases=gas).isotherms
    np.testing.assert_allclose(iso.pressure_pa, [15000, 75000, 135000])


@pytest.mark.parametrize("line", ["# gas: X", "# gas: X, molar_mass_g_per_mol=heavy",
                                  "# gas: X, molar_mass_g_per_mol=48,1", "# gas: X, colour=3"])
def test_bad_gas_line_is_a_batch_error(line):
    assert batch_error(line + "\n" + csv_of(*good_rows(), units="")).code == "invalid_gas"


def test_same_gas_declared_twice_differently():
    gases = [{"name": "G", "molar_mass_g_per_mol": 40.0}, {"name": "G", "molar_mass_g_per_mol": 41.0}]
    assert batch_error(csv_of(*good_rows()), gases=gases).code == "invalid_gas"
