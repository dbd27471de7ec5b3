"""Property tests: whatever arrives, read_batch returns a Batch or raises
IntakeError, and never because of a defect of its own (code internal_error).

Inputs are random (hypothesis); the accepted isotherms must still obey the
output contract: canonical arrays, sorted, finite, non-negative.
"""
import io
import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sorbrank.worker.intake import Limits, read_batch
from sorbrank.worker.isotherm import Batch, IntakeError

FAST = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
SMALL_LIMITS = Limits(max_isotherms=50, max_points_per_isotherm=40, max_columns=16, max_bytes=200_000)

HEADER = ["sorbent_id", "adsorbate", "temperature_k", "pressure", "loading"]
OPTIONAL = ["isotherm_id", "branch", "pressure_kpa", "loading_mmol_per_g", "saturation_pressure",
            "saturation_pressure_bar", "sample_mass_g", "loading_sigma", "loading_sigma_mg_per_g",
            "surface_area_m2_per_g", "pressure_unit", "sigma", "units", "pressure_kpaa"]
CELLS = st.one_of(
    st.sampled_from(["", "m1", "m/2", "..", "CO2", "N2", "nitrogen", "argn", "77", "298.15", "0", "-1",
                     "1e999", "nan", "NaN", "inf", "-inf", "1,5", "0.5", "1e-3", "kPa", "p/p0", "mmol",
                     "wt%", "bogus", "adsorption", "desorption", "\x00", '"', "\u2028", "  3  "]),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.text(max_size=12),
)


def check(source, **kwargs):
    """Run read_batch; assert it only ever raises a genuine IntakeError and that
    accepted isotherms honour the output contract."""
    try:
        batch = read_batch(source, limits=SMALL_LIMITS, **kwargs)
    except IntakeError as exc:
        assert exc.issues, "an IntakeError must carry at least one issue"
        assert all(i.code != "internal_error" for i in exc.issues), str(exc)
        return None
    assert isinstance(batch, Batch)
    assert all(i.code != "internal_error" for i in batch.rejected), [str(i) for i in batch.rejected]
    for iso in batch.isotherms:
        p, q = iso.pressure_pa, iso.loading_mol_per_kg
        assert p.shape == q.shape and p.size >= 3
        assert np.all(np.isfinite(p)) and np.all(np.isfinite(q))
        # sorted; replicates at one pressure are kept
        assert np.all(np.diff(p) >= 0) and np.all(p >= 0) and np.all(q >= 0)
        assert np.unique(p).size >= 3
        assert iso.temperature_k > 0
    return batch


@FAST
@given(st.binary(max_size=400))
def test_random_bytes(data):
    check(data)
    check(data, fmt="csv")
    check(data, fmt="json")


@FAST
@given(st.text(max_size=400))
def test_random_text(text):
    check(text)


@FAST
@given(
    extra=st.lists(st.sampled_from(OPTIONAL + ["junk", "Pressure", ""]), max_size=4),
    rows=st.lists(st.lists(CELLS, min_size=4, max_size=11), max_size=25),
    comments=st.lists(st.sampled_from(["# units: pressure:kPa,loading:mmol/g", "# units: pressure:??",
                                       "# units: loading", "# pressure_unit: kPa", "# gas: X",
                                       "# gas: Y, molar_mass_g_per_mol=5", "# sample_mass_g: -1",
                                       "# batch_label: b/1", "# note: x", "#", ""]), max_size=3),
    delimiter=st.sampled_from([",", ";", "\t"]),
)
def test_random_csv_tables(extra, rows, comments, delimiter):
    header = HEADER + extra
    lines = comments + [delimiter.join(header)] + [delimiter.join(r) for r in rows]
    check("\n".join(lines))
    check(("\n".join(lines)).encode("utf-8", "surrogatepass"), fmt="csv")
    check("\n".join(lines), delimiter=delimiter, decimal="," if delimiter != "," else None)


@FAST
@given(st.integers(min_value=1, max_value=400))
def test_huge_header_and_wide_rows(width):
    header = ",".join(f"c{i}" for i in range(width)) + "," + ",".join(HEADER)
    check(header + "\n" + ",".join(["1"] * (width + 5)) + "\n")
    check(("x" * width * 50) + "\n1\n")


JSON_SCALARS = st.one_of(st.none(), st.booleans(), st.integers(), st.floats(), st.text(max_size=8),
                         st.sampled_from(["CO2", "N2", "kPa", "mmol/g", "p/p0", "m1"]))
JSON_VALUES = st.recursive(JSON_SCALARS, lambda inner: st.one_of(st.lists(inner, max_size=5),
                                                                 st.dictionaries(st.text(max_size=6), inner,
                                                                                 max_size=4)),
                           max_leaves=20)
NUMBERS = st.lists(st.one_of(st.floats(), st.integers(min_value=-10, max_value=10 ** 400)), max_size=12)


@st.composite
def isotherm_objects(draw):
    obj = {
        "sorbent_id": draw(st.one_of(st.sampled_from(["m1", "m2", "a/b"]), JSON_VALUES)),
        "adsorbate": draw(st.one_of(st.sampled_from(["CO2", "nitrogen", "argn"]), JSON_VALUES)),
        "temperature_k": draw(st.one_of(st.floats(), st.sampled_from([77, 298.15, 195, 0]), JSON_VALUES)),
        "pressure": draw(st.one_of(NUMBERS, JSON_VALUES)),
        "loading": draw(st.one_of(NUMBERS, JSON_VALUES)),
    }
    for key in draw(st.lists(st.sampled_from(OPTIONAL), max_size=4)):
        obj[key] = draw(st.one_of(JSON_VALUES, NUMBERS, st.sampled_from(["kPa", "p/p0", "mmol", "desorption"])))
    return obj


@FAST
@given(
    isotherms=st.lists(st.one_of(isotherm_objects(), JSON_VALUES), max_size=6),
    defaults=st.one_of(st.none(), st.dictionaries(st.sampled_from(["units", "sample_mass_g", "gases",
                                                                   "batch_label", "defaults", "x"]),
                                                  st.one_of(JSON_VALUES, st.sampled_from(
                                                      ["pressure:kPa,loading:mmol/g", "pressure:p/p0"])),
                                                  max_size=3)),
    conditions=st.one_of(st.none(), JSON_VALUES),
    mixtures=st.one_of(st.none(), JSON_VALUES),
)
def test_random_json_documents(isotherms, defaults, conditions, mixtures):
    doc = {"isotherms": isotherms, **(defaults or {})}
    for key, value in (("conditions", conditions), ("mixtures", mixtures)):
        if value is not None:
            doc[key] = value
    text = json.dumps(doc)  # NaN and Infinity tokens included where floats drew them
    check(text)
    check(text.encode())


@FAST
@given(depth=st.integers(min_value=1, max_value=5000), bracket=st.sampled_from(["[", '{"a":']))
def test_deeply_nested_json(depth, bracket):
    closing = "]" if bracket == "[" else "}"
    check('{"isotherms": ' + bracket * depth + "1" + closing * depth + "}")
    check('{"isotherms": [' + bracket * depth, fmt="json")


@settings(max_examples=30, deadline=None)
@given(
    pressure=st.lists(st.one_of(st.none(), st.floats()), min_size=1, max_size=10),
    adsorbate=st.sampled_from(["CO2", "N2", "argn", ""]),
)
def test_random_parquet(pressure, adsorbate):
    n = len(pressure)
    table = pa.table({"sorbent_id": ["m"] * n, "adsorbate": [adsorbate] * n, "temperature_k": [298.15] * n,
                      "pressure": pressure, "loading": [1.0] * n})
    buf = io.BytesIO()
    pq.write_table(table.replace_schema_metadata({"units": "pressure:kPa,loading:mmol/g"}), buf)
    check(buf.getvalue())
    check(buf.getvalue()[: max(4, len(buf.getvalue()) // 2)])  # truncated file


@FAST
@given(points=st.lists(st.tuples(st.floats(0, 1e6), st.floats(0, 100)), min_size=3, max_size=30))
def test_good_points_are_kept_and_canonical(points):
    """Valid points in kPa and mmol/g come out as the same values x 1000 Pa, every one
    kept, sorted by pressure (replicates in input order): a property of any correct
    intake (the truth is the input itself)."""
    lines = ["sorbent_id,adsorbate,temperature_k,pressure,loading"]
    lines += [f"m,CH4,298.15,{p!r},{q!r}" for p, q in points]
    batch = check("\n".join(lines), units={"pressure": "kPa", "loading": "mmol/g"})
    distinct = sorted({p for p, _ in points})
    if len(distinct) < 3:
        assert batch.isotherms == [] and batch.rejected[0].code == "too_few_points"
        return
    # an up-then-down sequence in input order is two branches (docs/formats.md)
    assert 1 <= len(batch.isotherms) <= 2
    kept = sorted((p, q) for iso in batch.isotherms
                  for p, q in zip(iso.pressure_pa.tolist(), iso.loading_mol_per_kg.tolist()))
    assert kept == sorted((p * 1000.0, q) for p, q in points)
    for iso in batch.isotherms:
        assert np.all(np.diff(iso.pressure_pa) >= 0)
    if len(batch.isotherms) == 1:  # replicates in their input order
        (iso,) = batch.isotherms
        for p in set(iso.pressure_pa.tolist()):
            assert iso.loading_mol_per_kg[iso.pressure_pa == p].tolist() == \
                [q for pp, q in points if pp * 1000.0 == p]


@FAST
@given(points=st.lists(st.tuples(st.floats(1e-3, 1e6), st.floats(0, 100)), min_size=3, max_size=20),
       delimiter=st.sampled_from([",", ";", "\t"]), decimal_comma=st.booleans(),
       temperature=st.floats(50, 600))
def test_delimiters_and_decimal_commas_read_the_same_numbers(points, delimiter, decimal_comma,
                                                              temperature):
    """The same points written comma-, semicolon- or tab-delimited, with a decimal comma
    where the delimiter allows it, are read (delimiter and decimal mark detected) as the
    numbers written: a property of any correct reader, the truth being the input."""
    decimal_comma = decimal_comma and delimiter != ","

    def cell(x):
        text = repr(float(x))
        return text.replace(".", ",") if decimal_comma else text

    header = ["sorbent_id", "adsorbate", "temperature_k", "pressure_kpa", "loading_mmol_per_g"]
    lines = [delimiter.join(header)] + [delimiter.join(["m", "CH4", cell(temperature), cell(p), cell(q)])
                                        for p, q in points]
    reference = "\n".join([",".join(header)] + [f"m,CH4,{temperature!r},{p!r},{q!r}" for p, q in points])
    got, want = check("\n".join(lines)), check(reference)
    assert [i.code for i in got.rejected] == [i.code for i in want.rejected]
    for a, b in zip(got.isotherms, want.isotherms, strict=True):
        assert a.temperature_k == b.temperature_k
        np.testing.assert_array_equal(a.pressure_pa, b.pressure_pa)
        np.testing.assert_array_equal(a.loading_mol_per_kg, b.loading_mol_per_kg)
