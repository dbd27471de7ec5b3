"""The declared store schema (worker/store/schema.py): every column typed and
described, names that no common DataFrame API shadows, the catalogue's
parameters all present, and writers held to it (``conform``, called by
``Store.write_table``)."""
from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from sorbrank.worker import jobs
from sorbrank.worker.isotherm import Batch, Conditions, Isotherm
from sorbrank.worker.models import CATALOGUE
from sorbrank.worker.pipeline import FitOptions, process_batch
from sorbrank.worker.store import TABLES, Store, StoreError
from sorbrank.worker.store.schema import (PARTITION_COLUMN, QUALITY_FLAGS, SCHEMA_VERSION,
                                          SCHEMA_VERSION_KEY, SchemaMismatch, conform, declared,
                                          schemas)

PRESSURES_PA = np.array([2e3, 5e3, 1e4, 2e4, 4e4, 6e4, 8e4, 1e5])


def batch(label: str, refs=(1e4, 1e5)) -> Batch:
    """Invented Langmuir isotherms (truth-known synthetic)."""
    isotherms = [Isotherm(isotherm_id=f"{label}-{k}", sorbent_id=f"S{k}", adsorbate="CO2",
                          temperature_k=298.15, pressure_pa=PRESSURES_PA.copy(),
                          loading_mol_per_kg=3.0 * b * PRESSURES_PA / (1 + b * PRESSURES_PA),
                          batch_label=label, original={})
                 for k, b in enumerate((2e-5, 5e-5, 1e-4))]
    return Batch(label=label, isotherms=isotherms,
                 conditions=Conditions(reference_pressures_pa=tuple(refs)))


def test_the_store_declares_the_four_tables_at_version_3():
    assert set(schemas()) == set(TABLES) and SCHEMA_VERSION == "3"
    for table in TABLES:
        assert declared(table).metadata[SCHEMA_VERSION_KEY] == b"3"


@pytest.mark.parametrize("table", TABLES)
def test_every_column_is_typed_described_and_carries_a_unit_key(table):
    for fld in declared(table):
        assert not pa.types.is_null(fld.type), fld.name
        if pa.types.is_list(fld.type):
            assert not pa.types.is_null(fld.type.value_type), fld.name
        meta = fld.metadata or {}
        assert meta.get(b"description"), fld.name
        assert b"unit" in meta, fld.name
    assert PARTITION_COLUMN not in declared(table).names  # the directory carries it


def test_units_follow_the_names():
    fields = {f.name: f.metadata[b"unit"].decode() for t in TABLES for f in declared(t)}
    assert fields["temperature_k"] == "K"
    assert fields["loading_ads_mol_per_kg"] == "mol/kg"
    assert fields["henry_mol_per_kg_pa"] == "mol/(kg·Pa)"
    assert fields["reference_pressures_pa"] == "Pa"
    assert fields["isosteric_heat_j_per_mol"] == "J/mol"
    assert fields["bet_area_m2_per_g"] == "m²/g"
    # parameters take their unit from the model catalogue
    assert fields["param_affinity"] == "1/Pa" and fields["param_q_sat"] == "mol/kg"


def test_no_column_name_is_shadowed_by_a_pandas_or_polars_dataframe_attribute():
    pandas = pytest.importorskip("pandas")
    polars = pytest.importorskip("polars")
    taken = set(dir(pandas.DataFrame)) | set(dir(polars.DataFrame))
    assert "flags" in taken  # the attribute the old column name hid behind
    names = {PARTITION_COLUMN} | {n for t in TABLES for n in declared(t).names}
    clashes = sorted(names & taken)
    assert not clashes, f"declared columns that df.<name> would not reach: {clashes}"
    assert QUALITY_FLAGS in names and "flags" not in names


def test_fits_hold_every_catalogue_parameter():
    names = set(declared("fits").names)
    for model in CATALOGUE.values():
        for param in model.params:
            for prefix in ("param_", "stderr_", "ci95_low_", "ci95_high_", "at_bound_"):
                assert prefix + param.name in names, (model.id, prefix + param.name)


def test_conform_fills_casts_orders_and_refuses_what_is_not_declared():
    data = pa.table({"sorbent_id": ["S1", "S2"], "isotherm_id": ["i1", "i2"],
                     "hysteresis_desorption_isotherm_id": pa.nulls(2),  # typed null
                     "n_points": pa.array([8, 9], pa.int32())})
    out = conform("summaries", data)
    assert out.schema.equals(declared("summaries"), check_metadata=True)
    assert out["isotherm_id"].to_pylist() == ["i1", "i2"]
    assert out["n_points"].type == pa.int64() and out["n_points"].to_pylist() == [8, 9]
    assert out["hysteresis_desorption_isotherm_id"].type == pa.string()
    assert out["q_sat_mol_per_kg"].null_count == 2
    with pytest.raises(SchemaMismatch, match="loading_at_15000_pa_mol_per_kg"):
        conform("summaries", data.append_column("loading_at_15000_pa_mol_per_kg",
                                                pa.array([1.0, 2.0])))
    with pytest.raises(SchemaMismatch, match="'isotherm_id'"):
        conform("summaries", pa.table({"isotherm_id": pa.array([[1.0]], pa.list_(pa.float64()))}))


def test_the_batch_result_tables_are_the_declared_ones():
    # refs differ in number between the two batches: the columns do not
    result_a = process_batch(batch("a"), FitOptions(models=["langmuir", "sips"]))
    result_b = process_batch(batch("b", refs=(1.5e4,)), FitOptions(models=["henry"]))
    for result, refs in ((result_a, [1e4, 1e5]), (result_b, [1.5e4])):
        summary = result.summary_table()
        whole = declared("summaries")
        assert summary.schema.equals(whole.remove(whole.get_field_index("accepted_at")))
        assert summary["reference_pressures_pa"].to_pylist() == [refs] * 3
        fits = result.fits_table()
        assert fits.schema.names == [n for n in declared("fits").names if n != "accepted_at"]
        # one vocabulary: the JSON record and the table name the flags alike
        record = result.isotherm_records()[0]
        assert QUALITY_FLAGS in record and "flags" not in record
        assert record["summary"]["reference_pressures_pa"] == refs
    # Langmuir loadings at the reference pressures, from each isotherm's own fit
    summary = result_a.summary_table().to_pylist()
    fits = [f for f in result_a.fits_table().to_pylist() if f["selected"]]
    for row, fit in zip(summary, fits):
        assert fit["isotherm_id"] == row["isotherm_id"]
        if fit["model"] != "langmuir":
            continue
        q, b = fit["param_q_sat"], fit["param_affinity"]
        np.testing.assert_allclose(row["reference_loadings_mol_per_kg"],
                                   [q * b * p / (1 + b * p) for p in (1e4, 1e5)], rtol=1e-12)


def test_every_file_the_jobs_write_has_the_declared_schema(tmp_path):
    store = Store(tmp_path)
    for label, refs in (("a", (1e4, 1e5)), ("b", (2.5e3,))):
        manifest = jobs.accept_batch(store, batch(label, refs), options={"models": ["langmuir"]},
                                     chunk_size=2)
        for chunk in manifest["chunks"]:
            jobs.run_chunk(store, manifest["batch_id"], chunk["index"])
    for table in ("inputs", "summaries", "fits"):
        files = sorted(tmp_path.glob(f"{table}/*/*.parquet"))
        assert len(files) == 4, table
        for path in files:
            assert pq.read_schema(path).equals(declared(table), check_metadata=False), path
    assert (tmp_path / "schema_version.json").is_file()
    assert Store(tmp_path).schema_problem() is None


def test_write_table_refuses_an_undeclared_column(tmp_path):
    store = Store(tmp_path)
    table = pa.table({"isotherm_id": ["i"], "flags": [["x"]]})
    with pytest.raises(SchemaMismatch, match="flags"):
        store.write_table("summaries", "b-20250101-000000-000000-00000000", 0, table)
    assert not list(tmp_path.rglob("*.parquet"))


def test_a_store_marked_with_another_version_is_refused(tmp_path):
    (tmp_path / "schema_version.json").write_text('{"schema_version": "9"}')
    problem = Store(tmp_path).schema_problem()
    assert "schema version 9" in problem
    with pytest.raises(StoreError, match="schema version 9"):
        Store(tmp_path).write_table("inputs", "b-20250101-000000-000000-00000000", 0,
                                    pa.table({"isotherm_id": ["i"]}))
