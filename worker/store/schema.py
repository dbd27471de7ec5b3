"""The store's declared schema: one pyarrow schema per table, versioned.

Every data file of a table has exactly the columns declared here, in this
order and with these types (``conform``, called by ``Store.write_table``), so
any Parquet reader opens a table's files as one dataset with a plain glob:
no column typed ``null`` because a batch happened to leave it empty, no
column whose name depends on a batch's conditions.

Two choices shape it (docs/schema.md says the same to readers):

- **Fit parameters are flat columns**, ``param_<name>``, ``stderr_<name>``,
  ``ci95_low_<name>``, ``ci95_high_<name>``, ``at_bound_<name>`` for every
  parameter name in the model catalogue (null where the row's model has no
  such parameter): one number per cell, so a database filters, indexes and
  loads them as plain numeric columns, and the names are the ones the API
  and ``sorbrank fit`` already used. A model that brings a new parameter
  name adds columns: the generated docs/schema.md then differs (its test
  fails until it is regenerated) and ``sorbrank migrate-store`` adds the
  columns, as typed nulls, to older files.
- **Loadings at reference pressures are list columns** of the summaries,
  ``reference_pressures_pa`` with the loadings at those pressures in the
  same order: a batch may ask for any number of reference pressures, so
  they cannot be column names; lists keep them on the isotherm's own row
  (no second table to join) and every reader, and PostgreSQL arrays, take
  ``list<double>``.

The partition column ``batch_id`` is not stored in the files: the hive
directory ``batch_id=<id>`` carries it and pandas, polars, pyarrow.dataset
and DuckDB all read it from there (pandas as a categorical of strings).

``python -m sorbrank.worker.store.schemadoc`` writes docs/schema.md from
this module (``--check``: exit 1 when the file differs).
"""
from __future__ import annotations

import functools

import pyarrow as pa

SCHEMA_VERSION = "3"
SCHEMA_VERSION_KEY = b"sorbrank.schema_version"
PARTITION_COLUMN = "batch_id"
# the flags column of every table; "flags" itself is an attribute of
# pandas and polars DataFrames, so df.flags would not reach the column
QUALITY_FLAGS = "quality_flags"

_UNIT_SUFFIXES = (  # longest first: "_mol_per_kg_pa" before "_pa"
    ("_mol2_per_kg2", "mol²/kg²"), ("_mol_per_kg_pa", "mol/(kg·Pa)"), ("_mol_per_kg", "mol/kg"),
    ("_cm3stp_per_g", "cm³(STP)/g"), ("_m2_per_g", "m²/g"), ("_j_per_mol", "J/mol"),
    ("_per_nm2", "1/nm²"), ("_nm2", "nm²"), ("_per_pa", "1/Pa"), ("_per_g", "1/g"),
    ("_pa", "Pa"), ("_k", "K"),
)


class SchemaMismatch(ValueError):
    """A table handed to the store does not fit its declared schema."""


def unit_of(name: str) -> str:
    """The unit a column's name carries ("" for text, counts and ratios)."""
    for suffix, unit in _UNIT_SUFFIXES:
        if name.endswith(suffix):
            return unit
    return ""


def column(name: str, type_: pa.DataType, description: str, unit: str | None = None,
           ) -> pa.Field:
    unit = unit_of(name) if unit is None else unit
    return pa.field(name, type_, nullable=True,
                    metadata={b"description": description.encode(), b"unit": unit.encode()})


STR, F64, I64, BOOL = pa.string(), pa.float64(), pa.int64(), pa.bool_()
LIST_F64, LIST_STR = pa.list_(pa.float64()), pa.list_(pa.string())
TIMESTAMP = pa.timestamp("us", tz="UTC")

_IDENTITY = [
    column("isotherm_id", STR, "the isotherm's id, as sent"),
    column("sorbent_id", STR, "the sample's id, as sent"),
    column("adsorbate", STR, "the gas, in its canonical form"),
]
_ACCEPTED_AT = column("accepted_at", TIMESTAMP, "when the batch was accepted (latest wins)")
_FLAGS = column(QUALITY_FLAGS, LIST_STR, "quality flags (docs/results.md, \"Flags\")")

INPUTS = pa.schema([
    *_IDENTITY,
    column("temperature_k", F64, "measurement temperature"),
    column("branch", STR, "adsorption or desorption"),
    column("saturation_pressure_pa", F64, "saturation pressure p0 (given or from the gas table)"),
    column("surface_area_m2_per_g", F64, "surface area given with the isotherm"),
    column("batch_label", STR, "the batch's label, as sent"),
    column(QUALITY_FLAGS, LIST_STR, "intake flags (docs/results.md, \"Flags\")"),
    column("pressure_pa", LIST_F64, "measured absolute pressures, canonical units"),
    column("loading_mol_per_kg", LIST_F64, "measured loadings, canonical units"),
    column("sigma_mol_per_kg", LIST_F64, "standard deviation of each loading, when given"),
    column("original_json", STR, "the isotherm as sent (JSON text), before unit conversion", ""),
])


def _averaged(figure: str, unit: str, what: str) -> list[pa.Field]:
    return [
        column(f"{figure}_averaged_{unit}", F64, f"{what}, averaged over the eligible models"),
        column(f"{figure}_averaged_stderr_{unit}", F64, f"standard error of the averaged {what}"),
        column(f"{figure}_averaged_ci95_low_{unit}", F64, f"95 % interval of the averaged {what}, low"),
        column(f"{figure}_averaged_ci95_high_{unit}", F64,
               f"95 % interval of the averaged {what}, high"),
    ]


_REFERENCE = "at each of reference_pressures_pa, in its order"

SUMMARIES = pa.schema([
    *_IDENTITY,
    column("branch", STR, "adsorption or desorption"),
    column("temperature_k", F64, "measurement temperature"),
    column("n_points", I64, "measured points"),
    column("criterion", STR, "selection criterion: aicc, aic or bic"),
    column("best_model", STR, "the selected model (null: none)"),
    column("ambiguous", BOOL, "another model lies within 2 criterion units"),
    column("runner_up", STR, "the second-best model"),
    column("delta_runner_up", F64, "criterion difference to the runner-up"),
    column("linearized_q_sat_mol_per_kg", F64, "saturation capacity of the double-reciprocal line"),
    column("linearized_affinity_per_pa", F64, "affinity of the double-reciprocal line"),
    column("replicate_points", I64, "points at a replicated pressure"),
    column("pure_error_variance_mol2_per_kg2", F64, "pure-error variance of the replicates"),
    column("pure_error_dof", I64, "degrees of freedom of the pure error"),
    column("lack_of_fit_f", F64, "lack-of-fit F statistic of the selected model"),
    column("lack_of_fit_dof_model", I64, "lack-of-fit degrees of freedom (model)"),
    column("lack_of_fit_dof_pure_error", I64, "lack-of-fit degrees of freedom (pure error)"),
    column("lack_of_fit_p", F64, "p-value of the lack-of-fit F test"),
    column("residual_runs", I64, "runs of residual signs of the selected model"),
    column("residual_runs_p", F64, "p-value of the runs test"),
    column("hysteresis_max_width_mol_per_kg", F64, "widest loading gap to the desorption branch"),
    column("hysteresis_max_width_pressure_pa", F64, "pressure of the widest gap"),
    column("hysteresis_closure_pressure_pa", F64, "pressure where the loop closes"),
    column("hysteresis_closure_relative_pressure", F64, "p/p0 where the loop closes", "p/p0"),
    column("hysteresis_tolerance_mol_per_kg", F64, "gap counted as hysteresis (2 % of the top)"),
    column("hysteresis_desorption_isotherm_id", STR, "the desorption branch compared with"),
    column("q_sat_mol_per_kg", F64, "saturation capacity"),
    column("q_sat_model", STR, "the model q_sat comes from"),
    column("q_sat_kind", STR, "what kind of capacity q_sat is (monolayer, pore filling)"),
    column("q_sat_stderr_mol_per_kg", F64, "standard error of q_sat"),
    column("q_sat_ci95_low_mol_per_kg", F64, "95 % interval of q_sat, low"),
    column("q_sat_ci95_high_mol_per_kg", F64, "95 % interval of q_sat, high"),
    column("monolayer_volume_cm3stp_per_g", F64, "monolayer volume at STP"),
    column("sites_per_g", F64, "adsorption sites per gram"),
    column("henry_mol_per_kg_pa", F64, "Henry constant (slope at p -> 0)"),
    column("henry_source", STR, "where the Henry constant comes from (model, virial)"),
    column("henry_stderr_mol_per_kg_pa", F64, "standard error of the Henry constant"),
    column("henry_ci95_low_mol_per_kg_pa", F64, "95 % interval of the Henry constant, low"),
    column("henry_ci95_high_mol_per_kg_pa", F64, "95 % interval of the Henry constant, high"),
    column("henry_model_mol_per_kg_pa", F64, "the selected model's slope at p -> 0"),
    column("henry_virial_mol_per_kg_pa", F64, "the virial fit's slope at p -> 0"),
    column("henry_bend_at_lowest_point", F64, "relative bend of the Henry curve at the lowest point",
           ""),
    column("loading_ads_mol_per_kg", F64, "loading at the adsorption pressure"),
    column("loading_des_mol_per_kg", F64, "loading at the desorption pressure"),
    column("working_capacity_mol_per_kg", F64, "loading_ads - loading_des (pressure swing)"),
    column("reference_pressures_pa", LIST_F64, "the batch's reference pressures, in its order"),
    column("reference_loadings_mol_per_kg", LIST_F64, f"selected model's loading {_REFERENCE}"),
    column("coverage_at_adsorption", F64, "q(p_ads)/q_sat", ""),
    column("coverage_pressure_pa", F64, "pressure the coverage is taken at"),
    column("bet_area_m2_per_g", F64, "BET area"),
    column("bet_area_stderr_m2_per_g", F64, "standard error of the BET area"),
    column("bet_area_ci95_low_m2_per_g", F64, "95 % interval of the BET area, low"),
    column("bet_area_ci95_high_m2_per_g", F64, "95 % interval of the BET area, high"),
    column("bet_c", F64, "BET C constant", ""),
    column("bet_monolayer_mol_per_kg", F64, "BET monolayer loading"),
    column("bet_monolayer_stderr_mol_per_kg", F64, "standard error of the BET monolayer"),
    column("bet_range_relative_pressure_low", F64, "low end of the BET range", "p/p0"),
    column("bet_range_relative_pressure_high", F64, "high end of the BET range", "p/p0"),
    column("bet_r2", F64, "R² of the BET line", ""),
    column("bet_n_points", F64, "points in the BET range"),
    column("bet_criteria", STR, "BET consistency criteria met, e.g. \"1,2,3,4\""),
    *_averaged("q_sat", "mol_per_kg", "q_sat"),
    column("q_sat_averaged_weight_share", F64, "Akaike weight behind the averaged q_sat", ""),
    *_averaged("henry", "mol_per_kg_pa", "Henry constant"),
    column("henry_averaged_weight_share", F64, "Akaike weight behind the averaged Henry constant",
           ""),
    *_averaged("loading_ads", "mol_per_kg", "loading at the adsorption pressure"),
    *_averaged("loading_des", "mol_per_kg", "loading at the desorption pressure"),
    *_averaged("working_capacity", "mol_per_kg", "working capacity"),
    column("reference_loadings_averaged_mol_per_kg", LIST_F64,
           f"averaged loading {_REFERENCE}"),
    column("reference_loadings_averaged_stderr_mol_per_kg", LIST_F64,
           f"standard error of the averaged loading {_REFERENCE}"),
    column("reference_loadings_averaged_ci95_low_mol_per_kg", LIST_F64,
           f"95 % interval of the averaged loading, low, {_REFERENCE}"),
    column("reference_loadings_averaged_ci95_high_mol_per_kg", LIST_F64,
           f"95 % interval of the averaged loading, high, {_REFERENCE}"),
    column("monolayer_source", STR, "bet or q_sat: where the monolayer volume comes from"),
    column("surface_area_used_m2_per_g", F64, "surface area the sites are spread over"),
    column("surface_area_source", STR, "given or bet: where that area comes from"),
    column("sites_per_nm2", F64, "site density"),
    column("area_per_site_nm2", F64, "area per site"),
    column("bet_range_relative_pressure", LIST_F64, "[low, high] of the BET range", "p/p0"),
    _FLAGS,
    _ACCEPTED_AT,
])

# the reference-pressure figures: (summary list column, the per-pressure name
# template the metrics code computes, "{p}" being metrics.common.pressure_label)
REFERENCE_LISTS = (
    ("reference_loadings_mol_per_kg", "loading_at_{p}_pa_mol_per_kg"),
    ("reference_loadings_averaged_mol_per_kg", "loading_at_{p}_pa_averaged_mol_per_kg"),
    ("reference_loadings_averaged_stderr_mol_per_kg",
     "loading_at_{p}_pa_averaged_stderr_mol_per_kg"),
    ("reference_loadings_averaged_ci95_low_mol_per_kg",
     "loading_at_{p}_pa_averaged_ci95_low_mol_per_kg"),
    ("reference_loadings_averaged_ci95_high_mol_per_kg",
     "loading_at_{p}_pa_averaged_ci95_high_mol_per_kg"),
)


def _catalogue_params() -> list[tuple[str, str, list[str]]]:
    """(parameter name, unit, models) over the catalogue, first appearance first."""
    from ..models import CATALOGUE

    found: dict[str, tuple[list[str], list[str]]] = {}
    for model_id, model in CATALOGUE.items():
        for param in model.params:
            units, models = found.setdefault(param.name, ([], []))
            if param.unit not in units:
                units.append(param.unit)
            models.append(model_id)
    return [(name, units[0] if len(units) == 1 else "per model", models)
            for name, (units, models) in found.items()]


def _fits_schema() -> pa.Schema:
    fields = [
        *_IDENTITY,
        column("branch", STR, "adsorption or desorption"),
        column("temperature_k", F64, "measurement temperature"),
        column("n_points", I64, "measured points"),
        column("model", STR, "the model fitted (docs/results.md, \"Models and selection\")"),
        column("n_params", I64, "the model's parameter count"),
        column("applicable", BOOL, "the model applies to this isotherm (e.g. p0 known)"),
        column("converged", BOOL, "the fit converged"),
        column("reason", STR, "why it did not converge or apply"),
        column("selected", BOOL, "this model was selected for the isotherm"),
        column("excluded_reason", STR, "why selection excluded it"),
        column("sse", F64, "sum of squared (weighted) residuals", ""),
        column("rmse", F64, "root mean squared residual", "mol/kg"),
        column("r2", F64, "coefficient of determination", ""),
        column("aic", F64, "Akaike information criterion", ""),
        column("aicc", F64, "AIC with small-sample correction", ""),
        column("bic", F64, "Bayesian information criterion", ""),
        column("chi_square", F64, "chi-square against absolute sigma (else null)", ""),
        column("chi_square_dof", F64, "its degrees of freedom", ""),
        column("chi_square_p_value", F64, "its p-value", ""),
        column("akaike_weight", F64, "Akaike weight among the isotherm's models", ""),
    ]
    for name, unit, models in _catalogue_params():
        used = f"(models: {', '.join(models)})"
        fields += [
            column(f"param_{name}", F64, f"fitted {name} {used}", unit),
            column(f"stderr_{name}", F64, f"standard error of {name}", unit),
            column(f"ci95_low_{name}", F64, f"95 % interval of {name}, low", unit),
            column(f"ci95_high_{name}", F64, f"95 % interval of {name}, high", unit),
            column(f"at_bound_{name}", BOOL, f"{name} ended on a bound of the model", ""),
        ]
    return pa.schema(fields + [_ACCEPTED_AT])



SORBENTS = pa.schema([
    column("sorbent_id", STR, "the sample's id, as sent"),
    column("adsorbate", STR, "the gas (IAST: the components joined by \"/\")"),
    column("kind", STR, "isosteric_heat, temperature_swing or iast"),
    column("isotherm_ids", LIST_STR, "the isotherms the row is computed from"),
    column("temperatures_k", LIST_F64, "isosteric heat: their temperatures"),
    column("method", STR, "isosteric heat: two_point or regression"),
    column("qst_model", STR, "isosteric heat: the model family inverted"),
    column("reference_loading_mol_per_kg", F64, "isosteric heat: the loading it is given at"),
    column("isosteric_heat_j_per_mol", F64, "isosteric heat at the reference loading"),
    column("isosteric_heat_stderr_j_per_mol", F64, "its standard error"),
    column("qst_loading_mol_per_kg", LIST_F64, "isosteric heat: the loading grid"),
    column("qst_j_per_mol", LIST_F64, "isosteric heat over the loading grid"),
    column("qst_stderr_j_per_mol", LIST_F64, "its standard errors"),
    column("qst_withheld", LIST_STR, "why a grid value is withheld (\"\": shown)"),
    column("adsorption_temperature_k", F64, "temperature swing: adsorption temperature"),
    column("desorption_temperature_k", F64, "temperature swing: desorption temperature"),
    column("adsorption_pressure_pa", F64, "temperature swing: adsorption pressure"),
    column("desorption_pressure_pa", F64, "temperature swing: desorption pressure"),
    column("loading_ads_mol_per_kg", F64, "temperature swing: loading at adsorption"),
    column("loading_des_mol_per_kg", F64, "temperature swing: loading at desorption"),
    column("working_capacity_mol_per_kg", F64, "temperature swing: loading_ads - loading_des"),
    column("adsorbates", LIST_STR, "IAST: the mixture's components"),
    column("temperature_k", F64, "IAST: the mixture's temperature"),
    column("total_pressure_pa", F64, "IAST: total pressure"),
    column("gas_mole_fractions", LIST_F64, "IAST: gas-phase mole fractions", ""),
    column("models", LIST_STR, "IAST: each component's selected model"),
    column("adsorbed_mole_fractions", LIST_F64, "IAST: adsorbed-phase mole fractions", ""),
    column("loadings_mol_per_kg", LIST_F64, "IAST: each component's loading"),
    column("pure_component_pressures_pa", LIST_F64, "IAST: pure-component pressures"),
    column("total_loading_mol_per_kg", F64, "IAST: total loading"),
    column("reduced_spreading_pressure_mol_per_kg", F64, "IAST: reduced spreading pressure"),
    column("selectivity", F64, "IAST: (x1/x2)/(y1/y2)", ""),
    _FLAGS,
    _ACCEPTED_AT,
])


DESCRIPTIONS = {
    "inputs": "one row per accepted isotherm, normalised to canonical units",
    "summaries": "one row per isotherm: selection and screening figures",
    "fits": "one row per isotherm and model fitted",
    "sorbents": "per sorbent and gas (isosteric heat, temperature swing) and per mixture (IAST)",
}


@functools.lru_cache(maxsize=1)
def schemas() -> dict[str, pa.Schema]:
    """Every table's schema (fits built from the model catalogue, loaded on first use:
    the store itself does not import the catalogue)."""
    tables = {"inputs": INPUTS, "summaries": SUMMARIES, "fits": _fits_schema(),
              "sorbents": SORBENTS}
    return {name: schema.with_metadata({b"description": DESCRIPTIONS[name].encode()})
            for name, schema in tables.items()}



def declared(table: str) -> pa.Schema:
    """The declared schema of ``table``, with the schema version in its metadata."""
    if table not in schemas():
        raise ValueError(f"unknown table {table!r}")
    schema = schemas()[table]
    return schema.with_metadata({**schema.metadata, SCHEMA_VERSION_KEY: SCHEMA_VERSION.encode()})


def conform(table: str, data: pa.Table) -> pa.Table:
    """``data`` with exactly the declared columns of ``table``: in order, cast to
    their types (an all-null column of type null becomes a typed null),
    missing ones filled with typed nulls. SchemaMismatch for a column the
    schema does not declare, or one whose values cannot take the declared
    type: a writer that drifts from the schema fails where it writes."""
    schema = declared(table)
    names = [n for n in data.column_names if n != PARTITION_COLUMN]
    unexpected = [n for n in names if schema.get_field_index(n) < 0]
    if unexpected:
        raise SchemaMismatch(f"{table}: columns not in the declared schema (worker/store/schema.py)"
                             f": {', '.join(unexpected)}")
    if len(set(names)) != len(names):
        raise SchemaMismatch(f"{table}: a column appears twice")
    arrays = []
    for fld in schema:
        if fld.name not in names:
            arrays.append(pa.nulls(data.num_rows, fld.type))
            continue
        values = data[fld.name]
        if not values.type.equals(fld.type):
            try:
                values = values.cast(fld.type)
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as exc:
                raise SchemaMismatch(f"{table}: column {fld.name!r} is {values.type}, declared "
                                     f"{fld.type}: {exc}") from None
        arrays.append(values)
    return pa.Table.from_arrays(arrays, schema=schema)
