"""Intake limits and refused text: what a hostile or broken client can send.

Lone surrogates, bidi controls and zero-width characters in text fields;
Parquet files whose footer announces more rows than a batch may hold (refused
before the data are read, measured in a subprocess); values that overflow or
leave physical ranges on unit conversion; caps on condition lists and on how
much of a bad label is echoed. The data are invented (Tideglass-31 ids).
"""
from __future__ import annotations

import io
import json
import subprocess
import sys
import textwrap

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from sorbrank.worker import intake
from sorbrank.worker.intake import Limits, read_batch
from sorbrank.worker.isotherm import IntakeError

PRESSURES_KPA = [1.0, 2.0, 5.0, 10.0, 20.0]
LOADINGS = [0.1, 0.2, 0.4, 0.6, 0.8]


def iso(sorbent_id="TG31-S1", **changes) -> dict:
    doc = {"sorbent_id": sorbent_id, "adsorbate": "CO2", "temperature_k": 298.15,
           "pressure_kpa": PRESSURES_KPA, "loading_mol_per_kg": LOADINGS}
    doc.update(changes)
    return {k: v for k, v in doc.items() if v is not None}  # None: leave the key out


def body(*isotherms, **top) -> str:
    # json.dumps writes a lone surrogate as the escape \udXXX, which is valid JSON text
    return json.dumps({"isotherms": list(isotherms), **top})


def batch_error(source, **kw):
    with pytest.raises(IntakeError) as info:
        read_batch(source, **kw)
    (issue,) = info.value.issues
    return issue


def mixture(**changes) -> dict:
    doc = {"sorbent_id": "TG31-S1", "components": ["CO2", "N2"], "mole_fractions": [0.15, 0.85],
           "total_pressure_bar": 1.0, "temperature_k": 298.15}
    doc.update(changes)
    return doc


def parquet_bytes(table: pa.Table) -> bytes:
    sink = io.BytesIO()
    pq.write_table(table, sink)
    return sink.getvalue()


def points_table(n: int = 5, **columns) -> pa.Table:
    data = {"sorbent_id": ["TG31-S1"] * n, "adsorbate": ["CO2"] * n,
            "temperature_k": [298.15] * n, "pressure_kpa": [float(i + 1) for i in range(n)],
            "loading_mol_per_kg": [0.1 * (i + 1) for i in range(n)]}
    data.update(columns)
    return pa.table(data)


# --- lone surrogates (item 5 and 11) ---------------------------------------------------

@pytest.mark.parametrize("fld", ["sorbent_id", "isotherm_id", "adsorbate", "branch"])
def test_lone_surrogate_in_an_isotherm_text_field_rejects_that_isotherm_naming_the_field(fld):
    batch = read_batch(body(iso(**{fld: "TG31\ud800x"}), iso("TG31-S2")))
    assert [i.sorbent_id for i in batch.isotherms] == ["TG31-S2"]
    issues = [i for i in batch.rejected if i.field == fld]
    assert issues, [str(i) for i in batch.rejected]
    assert issues[0].code == ("invalid_id" if fld.endswith("_id") else "invalid_text")
    assert "surrogate" in issues[0].message and "U+D800" in issues[0].message
    # every message is encodable: it goes into JSON answers and log lines
    for issue in batch.rejected:
        issue.message.encode("utf-8")
        (issue.isotherm or "").encode("utf-8")


def test_lone_surrogate_in_a_mixture_sorbent_id_is_a_batch_error():
    issue = batch_error(body(iso(), iso(adsorbate="N2"), mixtures=[mixture(sorbent_id="TG\udc80")]))
    assert (issue.code, issue.field) == ("invalid_mixture", "mixtures[0].sorbent_id")
    assert "surrogate" in issue.message and "U+DC80" in issue.message


def test_lone_surrogate_in_the_batch_label_is_a_batch_error():
    issue = batch_error(body(iso(), batch_label="run\ud83d-7"))
    assert issue.code == "invalid_batch_label"
    assert "surrogate" in issue.message
    issue.message.encode("utf-8")
    issue.batch.encode("utf-8")


def test_lone_surrogate_in_a_declared_gas_name_is_a_batch_error():
    gas = {"name": "X\ud800", "molar_mass_g_per_mol": 48.1}
    issue = batch_error(body(iso(), gases=[gas]))
    assert issue.code == "invalid_gas"


# --- bidi controls and zero-width characters in ids (item 13) --------------------------

@pytest.mark.parametrize("char, name", [("\u202e", "RIGHT-TO-LEFT OVERRIDE"),
                                        ("\u2066", "LEFT-TO-RIGHT ISOLATE"),
                                        ("\u200f", "RIGHT-TO-LEFT MARK"),
                                        ("\u200b", "ZERO WIDTH SPACE"),
                                        ("\u200d", "ZERO WIDTH JOINER"),
                                        ("\ufeff", "ZERO WIDTH NO-BREAK SPACE")])
@pytest.mark.parametrize("fld", ["sorbent_id", "isotherm_id"])
def test_invisible_format_characters_in_ids_are_refused_by_name(fld, char, name):
    batch = read_batch(body(iso(**{fld: f"TG31{char}-S1"}), iso("TG31-S2")))
    assert [i.sorbent_id for i in batch.isotherms] == ["TG31-S2"]
    (issue,) = [i for i in batch.rejected if i.field == fld]
    assert issue.code == "invalid_id"
    assert f"U+{ord(char):04X}" in issue.message and name in issue.message
    assert char not in issue.message  # shown escaped, never rendered


def test_format_characters_in_the_batch_label_are_refused():
    issue = batch_error(body(iso()), batch_label="TG31\u202elabel")
    assert issue.code == "invalid_batch_label" and "U+202E" in issue.message


# --- ids a spreadsheet would run as a formula ------------------------------------------
# CSV exports put an apostrophe before text starting with = + - @ tab or CR (the OWASP
# "CSV injection" characters, common practice); an id so written would differ between
# CSV and Parquet, so intake refuses it and exports never touch an id.

FORMULA_IDS = ["=HYPERLINK(1)", "+SUM(A1)", "-MOF-neg", "@cmd", "'=quoted", "''-two"]


@pytest.mark.parametrize("bad", FORMULA_IDS)
@pytest.mark.parametrize("fld", ["sorbent_id", "isotherm_id"])
def test_an_id_beginning_with_a_formula_character_is_refused_naming_field_and_row(fld, bad):
    batch = read_batch(body(iso(**{fld: bad}), iso("TG31-S2")))
    assert [i.sorbent_id for i in batch.isotherms] == ["TG31-S2"]
    (issue,) = [i for i in batch.rejected if i.field == fld]
    assert (issue.code, issue.row) == ("formula_start", None)  # JSON: an isotherm-level field
    assert "formula" in issue.message and repr(bad[: len(bad) - len(bad.lstrip("'")) + 1]) \
        in issue.message


@pytest.mark.parametrize("fld", ["sorbent_id", "isotherm_id"])
def test_a_leading_tab_or_cr_never_reaches_an_id(fld):
    # ids are stripped of surrounding whitespace, so the tab and CR of the guard never
    # begin one
    batch = read_batch(body(iso(**{fld: "\tTG31-T"}), iso(**{"adsorbate": "N2", fld: "\rTG31-R"})))
    assert not batch.rejected
    assert {getattr(i, fld) for i in batch.isotherms} == {"TG31-T", "TG31-R"}


def test_formula_ids_in_a_csv_file_name_the_data_row():
    rows = ["sorbent_id,adsorbate,temperature_k,pressure_kpa,loading_mol_per_kg"]
    for sorbent in ("TG31-S1", "-MOF-neg", "MOF-neg-", "TG31-1e-3"):
        rows += [f"{sorbent},CO2,298.15,{p},{q}" for p, q in zip(PRESSURES_KPA, LOADINGS)]
    batch = read_batch(("\n".join(rows) + "\n").encode())
    # a minus, a letter or digit anywhere but first is fine
    assert [i.sorbent_id for i in batch.isotherms] == ["TG31-S1", "MOF-neg-", "TG31-1e-3"]
    (issue,) = batch.rejected
    assert (issue.code, issue.field, issue.row) == ("formula_start", "sorbent_id", 6)
    assert "'-MOF-neg'" in issue.message and "row 6" in str(issue)


def test_a_formula_mixture_sorbent_id_and_gas_name_are_batch_errors():
    issue = batch_error(body(iso(), iso(adsorbate="N2"), mixtures=[mixture(sorbent_id="=A1")]))
    assert (issue.code, issue.field) == ("formula_start", "mixtures[0].sorbent_id")
    issue = batch_error(body(iso(), gases=[{"name": "+R1", "molar_mass_g_per_mol": 48.1}]))
    assert (issue.code, issue.field) == ("formula_start", "gases[0]")


def test_text_that_is_not_an_id_keeps_its_formula_characters():
    # the batch label is no key of any table: accepted as sent, guarded in CSV cells
    batch = read_batch(body(iso()), batch_label="=night-run")
    assert batch.label == "=night-run" and len(batch.isotherms) == 1


def test_visible_non_ascii_ids_stay_accepted():
    batch = read_batch(body(iso("TG31-Zeolith-ß-日本"), batch_label="Lauf-α"))
    assert [i.sorbent_id for i in batch.isotherms] == ["TG31-Zeolith-ß-日本"]


# --- a long bad label is echoed cut (item 13) ------------------------------------------

def test_a_long_batch_label_is_echoed_cut_with_its_length():
    label = "L" * 10_000
    issue = batch_error(body(iso()), batch_label=label)
    assert issue.code == "invalid_batch_label"
    assert "10000 characters" in issue.message
    assert len(issue.message) < 400 and len(issue.batch) < 100
    assert "L" * 81 not in issue.message and "L" * 81 not in issue.batch


def test_a_long_label_does_not_leak_into_other_errors():
    """A bad label argument is refused first, so no later error carries it."""
    issue = batch_error("not,a,batch\n1,2,3\n", batch_label="L" * 10_000)
    assert issue.code == "invalid_batch_label" and "L" * 81 not in str(issue)


# --- Parquet footers announcing too much (item 6) --------------------------------------

def test_parquet_with_more_rows_than_a_batch_may_hold_is_refused_from_its_footer():
    limits = Limits(max_isotherms=2, max_points_per_isotherm=3)
    issue = batch_error(parquet_bytes(points_table(7)), limits=limits)
    assert issue.code == "input_too_large"
    assert "7 rows" in issue.message and "limit 6" in issue.message


def test_parquet_over_the_point_limit_is_refused_from_its_footer():
    issue = batch_error(parquet_bytes(points_table(12)), limits=Limits(max_points=10))
    assert issue.code == "input_too_large" and "12 rows" in issue.message


def test_parquet_whose_uncompressed_data_exceed_the_byte_limit_is_refused():
    data = parquet_bytes(points_table(5, note=["x" * 20_000] * 5))
    uncompressed = pq.ParquetFile(io.BytesIO(data)).metadata.row_group(0).total_byte_size
    issue = batch_error(data, limits=Limits(max_bytes=max(len(data) + 1, uncompressed - 1)))
    assert issue.code == "input_too_large" and "uncompressed" in issue.message


def test_parquet_reads_only_the_columns_it_needs():
    """An ignored column may be of any type or size: it is never decoded."""
    table = points_table(5).append_column("blob", pa.array([b"\x00" * 10] * 5, pa.binary()))
    batch = read_batch(parquet_bytes(table))
    assert len(batch.isotherms) == 1


HOSTILE_ROWS = 20_000_000
MEASURE = textwrap.dedent("""
    import resource, sys
    import pyarrow as pa, pyarrow.parquet as pq
    from sorbrank.worker.intake import Limits, read_batch
    from sorbrank.worker.isotherm import IntakeError

    # a few hundred KB of Parquet holding {rows} identical rows (dictionary- and run-length-
    # encoded); written in row groups of a million so building it stays small
    n = 1_000_000
    one = pa.table({{"sorbent_id": pa.array(["TG31-S1"] * n).dictionary_encode(),
                    "adsorbate": pa.array(["CO2"] * n).dictionary_encode(),
                    "temperature_k": pa.array([298.15] * n), "pressure_kpa": pa.array([1.0] * n),
                    "loading_mol_per_kg": pa.array([0.5] * n)}})
    sink = pa.BufferOutputStream()
    with pq.ParquetWriter(sink, one.schema, compression="zstd") as writer:
        for _ in range({rows} // n):
            writer.write_table(one)
    data = sink.getvalue().to_pybytes()
    del one, sink
    before = resource.getrusage(resource.RUSAGE_SELF)
    try:
        read_batch(data, "parquet", limits=Limits())
        code = "read"
    except IntakeError as exc:
        code = exc.issues[0].code
    after = resource.getrusage(resource.RUSAGE_SELF)
    cpu_s = (after.ru_utime + after.ru_stime) - (before.ru_utime + before.ru_stime)
    # growth of the peak beyond what building the file took: reading it must add ~nothing
    print(code, len(data), f"{{cpu_s:.3f}}", after.ru_maxrss // 1024,
          (after.ru_maxrss - before.ru_maxrss) // 1024)
""")


def test_hostile_20_million_row_parquet_is_refused_before_it_is_read():
    """The defect: a 0.4 MB file of 20 M rows cost ~27 s of CPU and ~6.9 GB before the
    per-isotherm point limit rejected it. Measured in a fresh interpreter; the bound is on
    memory (how far intake raises the process's peak RSS above what building the file
    took), not on time."""
    done = subprocess.run([sys.executable, "-c", MEASURE.format(rows=HOSTILE_ROWS)],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    code, size, cpu_s, peak_rss_mb, intake_growth_mb = done.stdout.split()
    print(f"\nhostile Parquet: {int(size)} bytes, {HOSTILE_ROWS} rows -> {code}; "
          f"intake CPU {float(cpu_s):.3f} s, peak RSS {peak_rss_mb} MB "
          f"(+{intake_growth_mb} MB by intake)")
    assert int(size) < 1_000_000
    assert code == "input_too_large"
    assert int(intake_growth_mb) < 100


# --- duplicate Parquet column names (item 13) ------------------------------------------

def test_parquet_with_a_duplicate_column_name_names_it_without_arrow_internals():
    arrays = [pa.array(["TG31-S1"] * 5), pa.array(["TG31-S1"] * 5), pa.array(["CO2"] * 5),
              pa.array([298.15] * 5), pa.array(PRESSURES_KPA), pa.array(LOADINGS)]
    names = ["sorbent_id", "sorbent_id", "adsorbate", "temperature_k", "pressure_kpa",
             "loading_mol_per_kg"]
    issue = batch_error(parquet_bytes(pa.Table.from_arrays(arrays, names=names)))
    assert (issue.code, issue.field) == ("duplicate_column", "sorbent_id")
    assert "FieldRef" not in issue.message and "__fragment_index" not in issue.message
    assert "\n" not in issue.message


def test_duplicate_ignored_parquet_columns_do_not_matter():
    table = points_table(5)
    table = pa.Table.from_arrays(table.columns + [pa.array([1] * 5), pa.array([2] * 5)],
                                 names=table.column_names + ["note", "note"])
    assert len(read_batch(parquet_bytes(table)).isotherms) == 1


# --- integers past float range (item 11) -----------------------------------------------

@pytest.mark.parametrize("kind, value", [(pa.int64(), 2**63 - 1), (pa.uint64(), 2**64 - 5)])
def test_huge_parquet_integers_are_rows_out_of_range_not_internal_errors(kind, value):
    table = points_table(5, pressure_kpa=pa.array([1, 2, 3, 4, value], kind))
    batch = read_batch(parquet_bytes(table))
    assert batch.isotherms == []
    (issue,) = [i for i in batch.rejected if i.field == "pressure_kpa"]
    assert (issue.code, issue.row) == ("out_of_range", 5)


@pytest.mark.parametrize("kind, value", [(pa.int64(), 2**63 - 1), (pa.uint64(), 2**64 - 5)])
def test_huge_parquet_integer_temperature_is_out_of_range(kind, value):
    batch = read_batch(parquet_bytes(points_table(5, temperature_k=pa.array([value] * 5, kind))))
    assert batch.isotherms == []
    assert {(i.code, i.field) for i in batch.rejected} == {("out_of_range", "temperature_k")}


# --- overflow and physical ranges after conversion (item 12) ---------------------------

def only_issue(batch, fld):
    assert batch.isotherms == [], "accepted"
    found = [i for i in batch.rejected if i.field == fld]
    assert found, [str(i) for i in batch.rejected]
    assert all(i.code != "too_few_points" for i in batch.rejected), \
        [str(i) for i in batch.rejected]
    return found[0]


def test_loading_that_overflows_on_conversion_is_rejected_by_row_and_field():
    doc = body(iso(loading_mol_per_g=[0.1, 0.2, 1e306, 0.4, 0.5], loading_mol_per_kg=None))
    issue = only_issue(read_batch(doc), "loading_mol_per_g")
    assert (issue.code, issue.row) == ("out_of_range", 2)
    assert "1e+306 mol/g" in issue.message and "mol/kg" in issue.message


def test_pressure_that_overflows_on_conversion_is_not_reported_as_too_few_points():
    doc = body(iso(pressure_kpa=[1.25e307, 1.3e307, 1.4e307, 1.5e307, 1.6e307]))
    batch = read_batch(doc)
    issue = only_issue(batch, "pressure_kpa")
    assert (issue.code, issue.row) == ("out_of_range", 0)
    assert "1.25e+307 kPa" in issue.message and "Pa" in issue.message


def test_temperature_above_the_physical_bound_is_rejected():
    issue = only_issue(read_batch(body(iso(temperature_k=1e300))), "temperature_k")
    assert issue.code == "out_of_range" and "2000 K" in issue.message


def test_temperature_at_the_bound_is_accepted():
    assert len(read_batch(body(iso(temperature_k=2000.0))).isotherms) == 1


def test_csv_rows_out_of_range_are_named():
    rows = "\n".join(f"TG31-S1,CO2,298.15,{p},{q}" for p, q in
                     [(1, 0.1), (2, 0.2), (5, 0.4), (2e7, 0.6), (20, 0.8)])
    batch = read_batch("sorbent_id,adsorbate,temperature_k,pressure_mpa,loading_mol_per_kg\n"
                       + rows + "\n")
    issue = only_issue(batch, "pressure_mpa")
    assert (issue.code, issue.row) == ("out_of_range", 4)
    assert "2e+07 MPa" in issue.message


def test_loading_above_the_bound_and_sigma_overflow():
    big = body(iso(loading_mol_per_kg=[0.1, 0.2, 0.3, 2e4, 0.5]))
    assert only_issue(read_batch(big), "loading_mol_per_kg").row == 3
    sigma = body(iso(loading_sigma_mol_per_g=[0.01, 0.01, 1e306, 0.01, 0.01]))
    assert only_issue(read_batch(sigma), "loading_sigma_mol_per_g").row == 2


def test_saturation_pressure_and_surface_area_out_of_range():
    p0 = body(iso(saturation_pressure_kpa=1e307))
    assert only_issue(read_batch(p0), "saturation_pressure_kpa").code == "out_of_range"
    area = body(iso(surface_area_m2_per_g=1e9))
    assert only_issue(read_batch(area), "surface_area_m2_per_g").code == "out_of_range"


def test_absolute_loading_over_a_tiny_sample_mass_overflows_and_is_rejected():
    doc = body(iso(loading_mmol=[1.0, 2.0, 3.0, 4.0, 5.0], loading_mol_per_kg=None,
                   sample_mass_g=1e-305))
    issue = only_issue(read_batch(doc), "loading_mmol")
    assert issue.code == "out_of_range"


@pytest.mark.parametrize("conditions, fld", [
    ({"adsorption_pressure_kpa": 1.25e307}, "conditions.adsorption_pressure"),
    ({"reference_pressures_mpa": [1.0, 1e306]}, "conditions.reference_pressures[1]"),
    ({"adsorption_temperature_k": 1e300}, "conditions.adsorption_temperature_k"),
])
def test_conditions_out_of_range_after_conversion(conditions, fld):
    issue = batch_error(body(iso(), conditions=conditions))
    assert (issue.code, issue.field) == ("invalid_conditions", fld)
    assert "limit" in issue.message


@pytest.mark.parametrize("changes, fld", [
    ({"total_pressure_bar": 1e306}, "mixtures[0].total_pressure"),
    ({"temperature_k": 1e300}, "mixtures[0].temperature_k"),
])
def test_mixture_out_of_range_after_conversion(changes, fld):
    issue = batch_error(body(iso(), iso(adsorbate="N2"), mixtures=[mixture(**changes)]))
    assert (issue.code, issue.field) == ("invalid_mixture", fld)


# --- reference pressures cap (item 8) --------------------------------------------------

def test_reference_pressures_are_capped():
    cap = intake.MAX_REFERENCE_PRESSURES
    ok = read_batch(body(iso(), conditions={"reference_pressures_kpa": list(range(1, cap + 1))}))
    assert len(ok.conditions.reference_pressures_pa) == cap
    issue = batch_error(body(iso(), conditions={"reference_pressures_kpa":
                                                list(range(1, 5046))}))
    assert (issue.code, issue.field) == ("invalid_conditions", "conditions.reference_pressures")
    assert "5045 values" in issue.message and f"at most {cap}" in issue.message


def test_limits_for_local_files_are_wider():
    assert Limits.for_local_files().max_points > Limits().max_points


def test_a_json_text_over_its_limit_is_refused_before_parsing():
    """JSON costs ~44x its size while parsed (measured on this service), so intake refuses
    an over-long text before json.loads; the limit is a documented Limits field."""
    from sorbrank.worker.intake import IntakeError, Limits, read_batch

    doc = {"units": "pressure:kPa,loading:mmol/g", "isotherms": [
        {"sorbent_id": "TG31-J001", "adsorbate": "CO2", "temperature_k": 298.15,
         "pressure": [1, 2, 5, 10], "loading": [0.1, 0.2, 0.4, 0.6]}]}
    text = json.dumps(doc)
    assert read_batch(text, "json", limits=Limits(max_json_bytes=len(text))).isotherms
    with pytest.raises(IntakeError) as err:
        read_batch(text, "json", limits=Limits(max_json_bytes=len(text) - 1))
    assert err.value.issues[0].code == "input_too_large"
    assert "Parquet or CSV" in str(err.value)
