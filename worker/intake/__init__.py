"""Intake: read a batch of isotherms (CSV, JSON, Parquet or a pyarrow Table),
validate it and normalise it to canonical units (Pa, K, mol/kg).

``read_batch`` raises only ``IntakeError``, and only when the input as a whole
cannot be used (not UTF-8, not parseable, required columns missing, over the
batch limits, bad batch-wide settings, bad conditions or mixtures). Problems of
one isotherm never raise: every problem found becomes an ``Issue`` in
``Batch.rejected`` and the good isotherms go on in ``Batch.isotherms``.
docs/formats.md is the user's reference for everything below.

Layout: ``source.py`` (what the input is, which format, settings), one reader
per format (``csv.py``, ``json.py``, ``parquet.py``, ``table.py``; each
registers itself with ``source.register_reader`` and produces the shared
``rows.Rows`` form), ``assemble.py`` (checks and conversion, in named steps,
with ``grouping.py``, ``checks.py``, ``accepted.py``), ``issues.py`` (findings
and messages), ``conditions.py`` (conditions and mixtures).

Columns
-------
CSV (long, one row per point), Parquet and Tables share the columns
``sorbent_id, adsorbate, temperature_k`` plus one pressure and one loading
column (required), and ``isotherm_id, branch, saturation_pressure,
sample_mass_g, loading_sigma, surface_area_m2_per_g`` (optional); other
columns are ignored. Column names are matched case-insensitively. Pressure,
loading, saturation_pressure and loading_sigma columns carry their unit in the
name (``pressure_kpa``, ``loading_mmol_per_g``; tokens in
``sorbrank.worker.units.COLUMN_TOKENS``) or are plain (``pressure``) and take
the unit from a ``units`` declaration. Two columns for one quantity
(``pressure_kpa`` and ``pressure_bar``) are an error, so is an old spelling
(``material_id``, ``pressure_unit``, ``loading_unit``, ``sigma``): the message
names the new one. A plain saturation pressure without a declared unit is in
the pressure unit (which must then be absolute); a plain loading_sigma is in
the loading unit. Rows group into isotherms by ``isotherm_id`` where given,
else by (sorbent_id, adsorbate, temperature_k, branch).

CSV files are comma-, semicolon- or tab-delimited: the header line decides
(``delimiter=None``), and numbers may use a decimal comma in a file that is
not comma-delimited (``decimal=None`` detects it from the number cells). In
a decimal-comma file a number written with a point is not a number.

JSON: ``{"batch_label", "units", "sample_mass_g", "gases", "isotherms": [...],
"conditions", "mixtures"}``, one object per isotherm with arrays for the
pressure, loading (and loading_sigma) columns, scalar fields named as the CSV
columns, and optionally its own ``units`` and ``sample_mass_g``. Unknown keys
at the top level, in ``conditions`` and in ``mixtures`` are errors (they are
usually typos); unknown keys inside an isotherm are ignored, like extra CSV
columns.

Row numbers in issues
---------------------
* CSV: ``row`` n is the n-th data row of the file, counted from 1. The header,
  the leading ``#`` comment lines and blank (empty or whitespace-only) lines
  are not counted.
* Parquet and Tables: ``row`` n is the n-th row of the table, counted from 1.
* JSON: ``row`` is the 0-based index of the point inside that isotherm's
  pressure/loading arrays; ``None`` for isotherm-level fields. An isotherm
  without ``isotherm_id`` is named ``isotherms[i]`` (0-based).
* ``field`` is the column (or JSON key) as named in the input, e.g.
  ``pressure_kpa``.

Settings and their precedence
-----------------------------
``units``, ``sample_mass_g``, ``batch_label`` and declared gases may be given
once per file (CSV leading comment lines ``# units: pressure:kPa,loading:mmol/g``,
``# sample_mass_g: 0.5``, ``# batch_label: run-7``, one
``# gas: <name>, molar_mass_g_per_mol=<x>, critical_temperature_k=<y>`` line
per gas; JSON top-level keys; Parquet key-value metadata ``units``,
``sample_mass_g``, ``batch_label``, ``gases`` (a JSON list)) or through
``read_batch(units=..., sample_mass_g=..., gases=...)``. The most specific
wins: the unit in a column name, then a JSON isotherm's own ``units``, then the
file, then the argument (the HTTP query parameters and the Python API pass
theirs there); ``sample_mass_g`` likewise (row/isotherm, file, argument). The
``batch_label`` argument overrides all; with no label anywhere the label is
``batch-`` + the first 12 hex digits of the input's SHA-256. There is no
default unit: an isotherm without a pressure or loading unit is rejected
(``missing_unit``) rather than guessed.

Units: see ``sorbrank.worker.units`` (wt% = g adsorbate per 100 g sorbent; STP =
273.15 K, 101.325 kPa). A declared gas (name, molar mass, optionally critical
temperature) is known for this batch only: mass-based loadings use its molar
mass; it has no saturation-pressure table, so p/p0 needs a given saturation
pressure.

Rules that change data (stated so nobody is surprised)
------------------------------------------------------
* Points are sorted by pressure (stable: replicates keep their input order).
* Replicates (points of one isotherm at exactly the same pressure after
  conversion to Pa) are all kept: every measured point is data for the fit,
  and the replicates give the pure error (docs/results.md). At least 3
  distinct pressures are needed.
* Branches from the pressure sequence: CSV/Parquet/Table rows that group into
  one isotherm without a branch (no branch value on any row, no isotherm_id)
  and come in measurement order with a clear up-then-down pressure sequence
  (non-decreasing through at least 3 distinct pressures to the highest, then
  non-increasing through at least 3 distinct lower ones) are split at the
  turning point: the rows up to the highest pressure are the adsorption
  branch, the rows after it the desorption branch. Any other order stays one
  isotherm. JSON isotherms are one branch each (their ``branch`` field).
* Non-monotonic loading is accepted but flagged ``non_monotonic_loading`` when
  some point lies below the highest loading at lower pressure by more than
  the noise allowance max(2 % of the isotherm's largest loading,
  3 x that point's sigma). Applied to both branches, since on either branch
  loading should not fall as pressure rises; excess isotherms at high
  pressure can, hence a flag, not a rejection.
* An isotherm given in absolute pressure that goes above the saturation
  pressure is accepted and flagged ``pressure_above_saturation``.
* ``Isotherm.original`` keeps, in input order, the numbers as sent (numpy
  arrays for pressure, loading, loading_sigma and the source ``rows``), their
  units (``units``: quantity -> unit name), the adsorbate name as sent and the
  source format.
* The saturation pressure comes from the input, else from
  ``sorbrank.worker.adsorbates`` (None when the temperature is supercritical or out of
  the property library's range, and for declared gases).

Limits and refused text
-----------------------
``Limits`` bounds a batch (isotherms, points per isotherm, points in all, columns,
bytes, JSON depth); a Parquet file is checked from its footer (rows, uncompressed
size) before its data are read. Ids and labels refuse lone surrogates, controls and
invisible format characters (category Cf); values above the physical bounds of
``sorbrank.worker.units`` after conversion are ``out_of_range``. docs/formats.md,
"Limits and refused input", states them.

Issue codes
-----------
Per isotherm: missing_value, not_a_number, not_finite, negative_value,
non_positive_value, wrong_type, length_mismatch, unknown_unit, missing_unit,
conflicting_columns, old_spelling, inconsistent_value,
unknown_adsorbate, unknown_branch, invalid_id, formula_start (an id beginning
with = + - @ tab or CR, which CSV exports would have to alter),
relative_pressure_above_one,
missing_saturation_pressure, missing_sample_mass, out_of_range (above the
physical bounds of ``sorbrank.worker.units``, after conversion), invalid_text,
too_few_points,
too_many_points, duplicate_isotherm_id, more_issues (the list was cut at 25
issues), internal_error.
Whole input (IntakeError): internal_error (a defect in intake, never bad
input), input_too_large, not_utf8, unparseable, unknown_format,
unsupported_source, unreadable_file, missing_column, wrong_delimiter,
duplicate_column, conflicting_columns, old_spelling, too_many_columns,
unsupported_column_type, malformed_row, no_data, too_many_isotherms,
too_deeply_nested, wrong_type, unknown_field, unknown_setting,
invalid_setting, unknown_unit, invalid_gas, invalid_batch_label,
invalid_conditions, invalid_mixture, formula_start (a mixture's sorbent_id or
a declared gas name).
"""
from __future__ import annotations

import hashlib
from typing import Any

import pyarrow as pa

from ..isotherm import Batch, IntakeError

# each reader module registers its format on import; this order is the order the
# formats are named in messages and tried in by content
from . import csv, json, parquet, table  # noqa: F401
from .assemble import assembled_batch
from .conditions import MAX_REFERENCE_PRESSURES, read_conditions, read_mixtures
from .csv import checked_csv_options
from .issues import batch_error, short
from .rows import Limits
from .source import (
    READERS,
    Reader,
    Source,
    check_batch_label,
    checked_settings,
    declared_gases,
    format_of,
    label_problem,
    register_reader,
    source_bytes,
    table_digest,
    table_format,
)

__all__ = ["IntakeError", "Limits", "MAX_REFERENCE_PRESSURES", "Reader", "checked_settings",
           "declared_gases", "read_batch", "read_conditions", "read_mixtures", "register_reader"]


def read_batch(source: Source, fmt: str | None = None, *, batch_label: str | None = None,
               units: dict[str, str] | str | None = None, sample_mass_g: float | str | None = None,
               delimiter: str | None = None, decimal: str | None = None,
               gases: list[dict[str, Any]] | None = None, limits: Limits | None = None) -> Batch:
    """Return the validated, unit-normalised Batch read from ``source``.

    ``source`` is bytes, text, a pathlib.Path or a pyarrow.Table; ``fmt`` is
    "csv", "json", "parquet" or None (inferred). ``units`` is a units
    declaration (text or mapping), ``sample_mass_g`` the sample mass for
    absolute loadings, ``gases`` a list of declared gases ({"name",
    "molar_mass_g_per_mol", optional "critical_temperature_k"}); all three
    apply where the input gives none itself. ``delimiter`` (",", ";", "\\t" or
    comma/semicolon/tab) and ``decimal`` ("." or ",") are for CSV; None
    detects them. Raises only IntakeError.
    """
    limits = limits or Limits()
    # a label that is not usable is never echoed whole: errors name the batch by its digest
    usable_label = batch_label if batch_label and label_problem(batch_label) is None else None
    fallback_label = usable_label or "(unlabelled)"
    try:
        if isinstance(source, pa.Table):
            data = None
            digest_label = f"batch-{table_digest(source, fallback_label, limits)}"
        else:
            data = source_bytes(source, usable_label, limits)
            digest_label = f"batch-{hashlib.sha256(data).hexdigest()[:12]}"
        if batch_label:
            check_batch_label(batch_label, digest_label)
        fallback_label = batch_label or digest_label
        fmt = table_format(fmt, fallback_label) if data is None else \
            format_of(source, data, fmt, fallback_label)
        arg_settings = checked_settings(
            {"units": units, "sample_mass_g": sample_mass_g, "gases": gases},
            "argument", fallback_label)
        delimiter, decimal = checked_csv_options(delimiter, decimal, fallback_label)
        rows = READERS[fmt].read(source if data is None else data, fallback_label, limits,
                                 {"delimiter": delimiter, "decimal": decimal})
        file_settings = checked_settings(rows.settings, "file", fallback_label)
        settings = {**arg_settings, **file_settings,
                    "units": {**arg_settings.get("units", {}), **file_settings.get("units", {})}}
        declared = declared_gases(arg_settings.get("gases", []) + file_settings.get("gases", []),
                                  fallback_label)
        label = batch_label or settings.get("batch_label") or fallback_label
        check_batch_label(label, fallback_label)
        batch = assembled_batch(rows, settings, declared, label, limits)
        if rows.requests is not None:
            batch.conditions = read_conditions(rows.requests["conditions"], settings, label)
            batch.mixtures = read_mixtures(rows.requests["mixtures"], settings, declared, label)
        return batch
    except IntakeError:
        raise
    except RecursionError:
        raise batch_error(fallback_label, "too_deeply_nested", "input is nested too deeply")
    except Exception as exc:  # noqa: BLE001 - the contract: only IntakeError leaves
        # a distinct code, so that a defect here is never mistaken for bad input
        raise batch_error(fallback_label, "internal_error",
                          f"input could not be read ({type(exc).__name__}: {short(exc)})")
