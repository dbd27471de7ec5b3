"""Intake: read a batch of isotherms (CSV, JSON, Parquet or a pyarrow Table),
validate it and normalise it to canonical units (Pa, K, mol/kg).

``read_batch`` raises only ``IntakeError``, and only when the input as a whole
cannot be used (not UTF-8, not parseable, required columns missing, over the
batch limits, bad batch-wide settings, bad conditions or mixtures). Problems of
one isotherm never raise: every problem found becomes an ``Issue`` in
``Batch.rejected`` and the good isotherms go on in ``Batch.isotherms``.
docs/formats.md is the user's reference for everything below.

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
unknown_adsorbate, unknown_branch, invalid_id, relative_pressure_above_one,
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
invalid_conditions, invalid_mixture.
"""
from __future__ import annotations

import csv
import hashlib
import json
import math
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pcsv
import pyarrow.parquet as pq

from . import adsorbates, units
from .isotherm import Batch, Conditions, IntakeError, Isotherm, Issue, MixtureRequest


@dataclass(frozen=True)
class Limits:
    max_isotherms: int = 20_000
    max_points_per_isotherm: int = 2_000
    max_columns: int = 64
    max_bytes: int = 256 * 1024 * 1024
    max_json_depth: int = 32
    # points (rows) of one batch: intake holds ~350 bytes per row at its peak, so 2 M rows
    # keep one intake under ~0.7 GB (a 20 M-row Parquet file peaked at 6.9 GB)
    max_points: int = 2_000_000
    # JSON costs ~44x its size in memory while parsed (Python objects per number), so its
    # bodies are held far below max_bytes; CSV and Parquet are read column-wise by Arrow
    max_json_bytes: int = 8 * 1024 * 1024

    @classmethod
    def for_local_files(cls) -> "Limits":
        """Limits for files read on one's own machine (``sorbrank fit``/``plot``):
        far above what the HTTP service accepts from a client."""
        return cls(max_isotherms=10_000_000, max_bytes=16 * 1024**3, max_points=1_000_000_000,
                   max_json_bytes=16 * 1024**3)

    @property
    def max_rows(self) -> int:
        """Most rows (points) a batch may have."""
        return min(self.max_points, self.max_isotherms * self.max_points_per_isotherm)


IDENTITY_COLUMNS = ("sorbent_id", "adsorbate", "temperature_k")
QUANTITIES = tuple(units.QUANTITY_KIND)            # columns that carry a unit
REQUIRED_QUANTITIES = ("pressure", "loading")
PLAIN_COLUMNS = IDENTITY_COLUMNS + ("isotherm_id", "branch", "sample_mass_g", "surface_area_m2_per_g")
TEXT_FIELDS = ("sorbent_id", "adsorbate", "isotherm_id", "branch")
# internal per-row text columns holding each quantity's canonical unit name
UNIT_FIELD = {q: f"unit:{q}" for q in QUANTITIES}
NUMBER_FIELDS = ("temperature_k", "pressure", "loading", "saturation_pressure",
                 "sample_mass_g", "loading_sigma", "surface_area_m2_per_g")
SETTINGS = ("units", "sample_mass_g", "batch_label", "gases")
_UNITS_HINT = ("name the unit in the column (e.g. pressure_kpa, loading_mmol_per_g) or declare "
               "it once with units (e.g. '# units: pressure:kPa,loading:mmol/g')")
# spellings of earlier versions: refused, with the new spelling in the message
OLD_SPELLINGS = {
    "material_id": "sorbent_id",
    "pressure_unit": "a unit in the column name (e.g. pressure_kpa) or one units declaration "
                     "(e.g. '# units: pressure:kPa,loading:mmol/g')",
    "loading_unit": "a unit in the column name (e.g. loading_mmol_per_g) or one units declaration "
                    "(e.g. '# units: pressure:kPa,loading:mmol/g')",
    "sigma": "loading_sigma (in the loading's unit) or loading_sigma_<unit>, e.g. "
             "loading_sigma_mmol_per_g",
    "defaults": "the top-level 'units' (e.g. {\"pressure\": \"kPa\", \"loading\": \"mmol/g\"}) "
                "and 'sample_mass_g'",
}
CSV_DELIMITERS = {",": "comma", ";": "semicolon", "\t": "tab"}
BRANCHES = ("adsorption", "desorption")
MAX_ID_CHARS = 200
MAX_ISSUES_PER_ISOTHERM = 25
NON_MONOTONIC_FRACTION = 0.02
NON_MONOTONIC_SIGMAS = 3.0

# problem codes of a number cell
_OK, _MISSING, _NOT_NUMBER, _NOT_FINITE = 0, 1, 2, 3
_PROBLEM_CODE = {_MISSING: "missing_value", _NOT_NUMBER: "not_a_number", _NOT_FINITE: "not_finite"}
# text codes below zero
_BLANK, _WRONG_TYPE = -1, -3

_FINITE_NUMBER_RE = r"^[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?$"
_NON_FINITE_RE = r"(?i)^[+-]?(nan|inf|infinity)$"


# ---------------------------------------------------------------------------
# column-wise intermediate form shared by the three formats

@dataclass
class _Text:
    codes: np.ndarray          # per row: index into values, _BLANK or _WRONG_TYPE
    values: list[str]


@dataclass
class _Numbers:
    value: np.ndarray          # float64, nan unless problem == _OK
    problem: np.ndarray        # int8 problem code per row
    raw: Callable[[int], Any]  # row -> value as sent, for messages


@dataclass
class _Rows:
    source: str
    n_rows: int
    text: dict[str, _Text]
    numbers: dict[str, _Numbers]
    row_label: np.ndarray
    group: np.ndarray | None = None            # JSON: isotherm index per row
    n_groups: int = 0
    group_names: list[str] | None = None
    isotherm_level: frozenset = frozenset()    # fields reported with row None
    group_issues: list[tuple[int, str | None, str, str]] = field(default_factory=list)
    settings: dict[str, Any] = field(default_factory=dict)
    column_names: dict[str, str] = field(default_factory=dict)   # internal name -> as sent
    group_column_names: list[dict[str, str]] | None = None        # JSON: the same per isotherm
    decimal: str = "."

    def field_name(self, fld: str | None, g: int) -> str | None:
        """The column (or JSON key) the sender used for internal field ``fld``."""
        if fld is None:
            return None
        names = self.group_column_names[g] if self.group_column_names is not None \
            else self.column_names
        return names.get(fld, fld)


# ---------------------------------------------------------------------------
# public entry point

def read_batch(source, fmt: str | None = None, *, batch_label: str | None = None,
               units: dict | str | None = None, sample_mass_g: float | str | None = None,
               delimiter: str | None = None, decimal: str | None = None,
               gases: list[dict] | None = None, limits: Limits | None = None) -> Batch:
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
    usable_label = batch_label if batch_label and _label_problem(batch_label) is None else None
    fallback_label = usable_label or "(unlabelled)"
    try:
        if isinstance(source, pa.Table):
            data = None
            digest_label = f"batch-{_table_digest(source, fallback_label, limits)}"
        else:
            data = _source_bytes(source, usable_label, limits)
            digest_label = f"batch-{hashlib.sha256(data).hexdigest()[:12]}"
        if batch_label:
            _check_batch_label(batch_label, digest_label)
        fallback_label = batch_label or digest_label
        fmt = _table_format(fmt, fallback_label) if data is None else \
            _format_of(source, data, fmt, fallback_label)
        arg_settings = _checked_settings(
            {"units": units, "sample_mass_g": sample_mass_g, "gases": gases},
            "argument", fallback_label)
        csv_options = _csv_options(delimiter, decimal, fallback_label)
        doc = None
        if fmt == "table":
            rows = _rows_from_arrow_table(source, "table", fallback_label, limits)
        elif fmt == "parquet":
            rows = _rows_from_parquet(data, fallback_label, limits)
        else:
            text = _decoded(data, fallback_label)
            if fmt == "json":
                doc = _parsed_json(text, fallback_label, limits)
                rows = _rows_from_json(doc, fallback_label, limits)
            else:
                rows = _rows_from_csv(data, text, fallback_label, limits, *csv_options)
        file_settings = _checked_settings(rows.settings, "file", fallback_label)
        settings = {**arg_settings, **file_settings,
                    "units": {**arg_settings.get("units", {}), **file_settings.get("units", {})}}
        declared = _declared_gases(arg_settings.get("gases", []) + file_settings.get("gases", []),
                                   fallback_label)
        label = batch_label or settings.get("batch_label") or fallback_label
        _check_batch_label(label, fallback_label)
        batch = _assemble(rows, settings, declared, label, limits)
        if doc is not None:
            batch.conditions = _conditions(doc.get("conditions"), settings, label)
            batch.mixtures = _mixtures(doc.get("mixtures"), settings, declared, label)
        return batch
    except IntakeError:
        raise
    except RecursionError:
        raise _batch_error(fallback_label, "too_deeply_nested", "input is nested too deeply")
    except Exception as exc:  # noqa: BLE001 - the contract: only IntakeError leaves
        # a distinct code, so that a defect here is never mistaken for bad input
        raise _batch_error(fallback_label, "internal_error",
                           f"input could not be read ({type(exc).__name__}: {_short(exc)})")


# ---------------------------------------------------------------------------
# source, format, settings

def _batch_error(label: str, code: str, message: str, fld: str | None = None) -> IntakeError:
    label, fld = _printable(label), None if fld is None else _printable(fld)
    where = f"batch {label!r}" + (f", field {fld!r}" if fld else "")
    return IntakeError(Issue(label, None, None, fld, code, _printable(f"{where}: {message}")))


def _short(value: Any, limit: int = 60) -> str:
    text = str(value)
    return text if len(text) <= limit else text[:limit] + "..."


def _printable(text: str) -> str:
    """``text`` with every character that is not printable (lone surrogates, controls,
    bidi and zero-width format characters) written as its escape: issue texts go into
    JSON, Parquet and logs, which need valid UTF-8, and must never reorder or hide what
    a reader sees."""
    if text.isprintable():
        return text
    return "".join(ch if ch.isprintable() else ascii(ch)[1:-1] for ch in text)


def _source_bytes(source, batch_label: str | None, limits: Limits) -> bytes:
    label = batch_label or "(unlabelled)"
    if isinstance(source, Path):
        try:
            size = source.stat().st_size
            if size > limits.max_bytes:
                raise _batch_error(label, "input_too_large",
                                   f"file is {size} bytes, limit {limits.max_bytes}")
            return source.read_bytes()
        except OSError as exc:
            raise _batch_error(label, "unreadable_file", f"cannot read {str(source)!r}: {exc}")
    if isinstance(source, str):
        try:
            data = source.encode("utf-8")
        except UnicodeEncodeError as exc:
            raise _batch_error(label, "not_utf8", f"text cannot be encoded as UTF-8: {exc.reason}")
    elif isinstance(source, (bytes, bytearray, memoryview)):
        data = bytes(source)
    else:
        raise _batch_error(label, "unsupported_source", "source must be bytes, str, pathlib.Path "
                           f"or pyarrow.Table, not {type(source).__name__}")
    if len(data) > limits.max_bytes:
        raise _batch_error(label, "input_too_large",
                           f"input is {len(data)} bytes, limit {limits.max_bytes}")
    return data


def _table_digest(table: pa.Table, label: str, limits: Limits) -> str:
    """First 12 hex digits of the SHA-256 of the table in Arrow IPC form."""
    if table.nbytes > limits.max_bytes:
        raise _batch_error(label, "input_too_large",
                           f"table holds {table.nbytes} bytes, limit {limits.max_bytes}")
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return hashlib.sha256(sink.getvalue()).hexdigest()[:12]


def _table_format(fmt: str | None, label: str) -> str:
    if fmt is not None and str(fmt).lower() not in ("parquet", "table"):
        raise _batch_error(label, "unknown_format",
                           f"format {fmt!r} does not apply to a pyarrow.Table (leave it out)")
    return "table"


def _format_of(source, data: bytes, fmt: str | None, label: str) -> str:
    if fmt is not None:
        fmt = str(fmt).lower()
        if fmt not in ("csv", "json", "parquet"):
            raise _batch_error(label, "unknown_format", f"format {fmt!r} is not csv, json or parquet")
        return fmt
    if isinstance(source, Path):
        suffix = source.suffix.lower()
        if suffix in (".csv", ".json"):
            return suffix[1:]
        if suffix in (".parquet", ".pq"):
            return "parquet"
    if data.startswith(b"PAR1"):
        return "parquet"
    return "json" if data.lstrip()[:1] == b"{" else "csv"


def _decoded(data: bytes, label: str) -> str:
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise _batch_error(label, "not_utf8",
                           f"input is not UTF-8 (invalid byte at offset {exc.start})")


def _old_spelling(name: str, where: str, label: str) -> IntakeError:
    where = where if "'" in where else f"{where} {name!r}"
    return _batch_error(label, "old_spelling", f"{where} is no longer read: use "
                        f"{OLD_SPELLINGS[name]}", fld=name)


def _checked_settings(raw: dict, where: str, label: str) -> dict[str, Any]:
    """Return the batch-wide settings in ``raw`` checked and typed: units as
    {quantity: canonical unit}, gases as a list of dicts."""
    if not isinstance(raw, dict):
        raise _batch_error(label, "wrong_type", f"{where} settings must be an object")
    out: dict[str, Any] = {}
    for key, value in raw.items():
        if value is None:
            continue
        name = str(key).strip().lower()
        if name in OLD_SPELLINGS:
            raise _old_spelling(name, f"{where} setting", label)
        if name not in SETTINGS:
            near = _nearest(name, SETTINGS)
            hint = f"; did you mean {near!r}?" if near else ""
            raise _batch_error(label, "unknown_setting",
                               f"unknown {where} setting {_short(key)!r}{hint}", fld=name)
        if name == "units":
            out[name] = _units_setting(value, f"{where} units", "units", label)
        elif name == "sample_mass_g":
            mass = _positive_float(value)
            if mass is None:
                raise _batch_error(label, "invalid_setting",
                                   f"{where} sample_mass_g {_short(value)!r} is not a positive number",
                                   fld=name)
            out[name] = mass
        elif name == "gases":
            if not isinstance(value, list):
                raise _batch_error(label, "invalid_gas", f"{where} gases must be a list", fld=name)
            out[name] = list(value)
        else:
            out[name] = str(value)
    return out


def _units_setting(value: Any, where: str, fld: str, label: str) -> dict[str, str]:
    try:
        return units.parse_units_declaration(value)
    except units.UnknownUnit as exc:
        raise _batch_error(label, "unknown_unit", f"{where}: {exc}", fld=fld)
    except ValueError as exc:
        raise _batch_error(label, "invalid_setting", f"{where}: {exc}", fld=fld)


def _declared_gases(raw: list, label: str) -> list:
    """The Adsorbates declared for this batch (argument first, then the file's)."""
    declared = []
    for i, item in enumerate(raw):
        fld = f"gases[{i}]"
        if not isinstance(item, dict):
            raise _batch_error(label, "invalid_gas", "a declared gas must be an object with name "
                               "and molar_mass_g_per_mol", fld=fld)
        allowed = ("name", "molar_mass_g_per_mol", "critical_temperature_k")
        for key in item:
            if key not in allowed:
                near = _nearest(key, allowed)
                raise _batch_error(label, "invalid_gas", f"unknown key {_short(key)!r}"
                                   + (f"; did you mean {near!r}?" if near else ""), fld=fld)
        name = item.get("name")
        if not isinstance(name, str) or not name.strip() or _id_problem(name.strip()):
            raise _batch_error(label, "invalid_gas", "needs a name (text usable as an id)", fld=fld)
        mass = _positive_float(item.get("molar_mass_g_per_mol"))
        if mass is None:
            raise _batch_error(label, "invalid_gas", f"gas {_short(name)!r}: molar_mass_g_per_mol "
                               f"{_short(item.get('molar_mass_g_per_mol'))!r} is not a positive "
                               "number", fld=fld)
        tc = item.get("critical_temperature_k")
        if tc is not None:
            tc = _positive_float(tc)
            if tc is None:
                raise _batch_error(label, "invalid_gas", f"gas {_short(name)!r}: "
                                   "critical_temperature_k is not a positive number", fld=fld)
        same = [g for g in declared if g.id == name.strip()]
        if same:
            if (same[0].molar_mass_g_per_mol, same[0].critical_temperature_k) != (mass, tc):
                raise _batch_error(label, "invalid_gas", f"gas {_short(name)!r} is declared twice "
                                   "with different values", fld=fld)
            continue
        try:
            declared.append(adsorbates.declare(name.strip(), mass, critical_temperature_k=tc))
        except ValueError as exc:
            raise _batch_error(label, "invalid_gas", f"gas {_short(name)!r}: {exc}", fld=fld)
    return declared


def _csv_options(delimiter: str | None, decimal: str | None, label: str) -> tuple[str | None, str | None]:
    """The CSV delimiter and decimal mark asked for (None: detect), checked."""
    names = {v: k for k, v in CSV_DELIMITERS.items()}
    if delimiter is not None:
        delimiter = names.get(str(delimiter).strip().lower(), delimiter)
        if delimiter == "\\t":
            delimiter = "\t"
        if delimiter not in CSV_DELIMITERS:
            raise _batch_error(label, "invalid_setting", f"delimiter {_short(delimiter)!r} is not one "
                               "of ',', ';', tab (or comma, semicolon, tab)", fld="delimiter")
    if decimal is not None:
        decimal = {"point": ".", "comma": ","}.get(str(decimal).strip().lower(), decimal)
        if decimal not in (".", ","):
            raise _batch_error(label, "invalid_setting", f"decimal {_short(decimal)!r} is not '.' or "
                               "',' (or point, comma)", fld="decimal")
        if decimal == "," and delimiter == ",":
            raise _batch_error(label, "invalid_setting", "a decimal comma needs a delimiter other "
                               "than a comma (';' or tab)", fld="decimal")
    return delimiter, decimal


def _positive_float(value: Any) -> float | None:
    if isinstance(value, bool):
        return None
    try:
        number = float(value)
    except (TypeError, ValueError, OverflowError):
        return None
    return number if math.isfinite(number) and number > 0 else None


def _nearest(name: str, choices) -> str | None:
    import difflib
    match = difflib.get_close_matches(str(name), list(choices), n=1, cutoff=0.6)
    return match[0] if match else None


def _character_problem(value: str, format_characters: bool) -> str | None:
    """Why the characters of ``value`` make it unusable text, or None: a lone surrogate
    (not Unicode text at all; JSON's \\ud800 escapes must come in high-low pairs), a control
    character and, where ``format_characters``, an invisible format character (category
    Cf: bidi controls such as U+202E, zero-width characters such as U+200B), with which
    two ids that look the same are not."""
    if value.isprintable():  # fast path: every refused character is non-printable
        return None
    for ch in value:
        category = unicodedata.category(ch)
        if category == "Cs":
            return (f"contains a lone surrogate (U+{ord(ch):04X}), which is not Unicode text "
                    "(a JSON \\uD800-\\uDFFF escape must be one of a high-low pair)")
        if category in ("Cc", "Zl", "Zp"):
            return "contains a control character"
        if category == "Cf" and format_characters:
            return (f"contains the invisible format character U+{ord(ch):04X} "
                    f"{unicodedata.name(ch, '(unnamed)')} (bidi controls and zero-width "
                    "characters make different ids look the same)")
    return None


def _id_problem(value: str) -> str | None:
    """Why ``value`` cannot be an id (it may become a file name), or None."""
    if len(value) > MAX_ID_CHARS:
        return f"is longer than {MAX_ID_CHARS} characters"
    if "/" in value or "\\" in value:
        return "contains a path separator"
    if value in (".", ".."):
        return "is a relative path name"
    return _character_problem(value, format_characters=True)


def _label_problem(label: str) -> str | None:
    return _id_problem(label) if label.strip() else "is empty"


def _echo(value: str, limit: int = 80) -> str:
    """``value`` for a message: its repr, cut to ``limit`` characters with its length."""
    if len(value) <= limit:
        return repr(value)
    return f"{value[:limit]!r}... ({len(value)} characters)"


def _check_batch_label(label: str, fallback: str) -> None:
    problem = _label_problem(label)
    if problem:
        raise _batch_error(fallback, "invalid_batch_label", f"batch label {_echo(label)} {problem}")


# ---------------------------------------------------------------------------
# CSV

HEADER_SETTINGS = ("units", "sample_mass_g", "batch_label", "gas")


def _split_comment_header(text: str, label: str) -> tuple[dict[str, Any], int]:
    """Settings from leading ``# key: value`` lines, and where the rest starts."""
    settings: dict[str, Any] = {}
    pos = 0
    while pos < len(text):
        end = text.find("\n", pos)
        end = len(text) if end < 0 else end + 1
        line = text[pos:end].strip()
        if line and not line.startswith("#"):
            break
        key, sep, value = line[1:].partition(":")
        key = key.strip().lower()
        # other comment lines are free text, and stay comments
        if sep and key in OLD_SPELLINGS:
            raise _old_spelling(key, "header line '# " + key + ":'", label)
        if sep and key == "gas":
            settings.setdefault("gases", []).append(_gas_line(value, label))
        elif sep and key in HEADER_SETTINGS:
            settings[key] = value.strip()
        pos = end
    return settings, pos


def _gas_line(value: str, label: str) -> dict[str, Any]:
    """``CH3SH, molar_mass_g_per_mol=48.107, critical_temperature_k=470`` -> a gas dict."""
    name, *pairs = [part.strip() for part in value.split(",")]
    gas: dict[str, Any] = {"name": name}
    for pair in pairs:
        key, sep, number = pair.partition("=")
        if not sep:
            raise _batch_error(label, "invalid_gas", f"header line '# gas:{_short(value)}': "
                               f"{_short(pair)!r} is not key=value (numbers in header lines use "
                               "a decimal point)", fld="gas")
        gas[key.strip().lower()] = number.strip()
    return gas


def _csv_delimiter(header_line: str, given: str | None) -> str:
    """The delimiter asked for, else the one that splits the header into the most
    known columns (ties: the one that splits it most)."""
    if given is not None:
        return given
    return max(CSV_DELIMITERS, key=lambda d: (_known_count(_header_names(header_line, d)),
                                              header_line.count(d)))


def _header_names(header_line: str, delimiter: str) -> list[str]:
    try:
        return next(csv.reader([header_line], delimiter=delimiter))
    except (csv.Error, StopIteration):
        return [header_line]


def _known_count(names: list[str]) -> int:
    count = 0
    for name in names:
        key = str(name).strip().lower()
        try:
            count += key in PLAIN_COLUMNS or units.unit_column(key) is not None
        except units.UnitError:
            count += 1
    return count


def _wrong_delimiter(header_line: str, delimiter: str, given: bool, label: str) -> IntakeError | None:
    """An error naming the delimiter the header seems to use, when that is why the
    required columns are missing; None when the split itself looks right."""
    others = {d: header_line.count(d) for d in (",", ";", "\t", "|")}
    seen = max(others, key=others.get)
    if others[seen] == 0 or seen == delimiter or others[seen] <= header_line.count(delimiter):
        return None
    def name(d):
        return CSV_DELIMITERS.get(d, repr(d))
    n_fields = len(_header_names(header_line, delimiter))
    if given:
        expected = f"the delimiter asked for is a {name(delimiter)} ({delimiter!r})"
        advice = (f"give delimiter {seen!r} or leave it to detection" if seen in CSV_DELIMITERS
                  else "save the file comma-, semicolon- or tab-delimited")
    else:
        expected = "sorbrank reads comma-, semicolon- or tab-delimited files"
        advice = "save the file with one of those"
    return _batch_error(label, "wrong_delimiter",
                        f"the header splits into {n_fields} column(s) on {delimiter!r} and lacks "
                        f"the required columns; it looks {name(seen)}-delimited ({others[seen]} x "
                        f"{seen!r} in the header), but {expected}: {advice}", fld="delimiter")


_COMMA_NUMBER_RE = r"^\s*[+-]?([0-9]+,[0-9]*|,[0-9]+)([eE][+-]?[0-9]+)?\s*$"
_POINT_NUMBER_RE = r"^\s*[+-]?([0-9]+\.[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?\s*$"


def _csv_decimal(table: pa.Table, columns: dict[str, str], delimiter: str, given: str | None) -> str:
    """The decimal mark asked for, else "," when a non-comma-delimited file writes
    more of its numbers with a comma than with a point."""
    if given is not None:
        return given
    if delimiter == ",":
        return "."
    with_comma = with_point = 0
    for name, original in columns.items():
        if name in NUMBER_FIELDS:
            column = table.column(original)
            with_comma += pc.sum(pc.match_substring_regex(column, _COMMA_NUMBER_RE)).as_py() or 0
            with_point += pc.sum(pc.match_substring_regex(column, _POINT_NUMBER_RE)).as_py() or 0
    return "," if with_comma > with_point else "."


def _rows_from_csv(data: bytes, text: str, label: str, limits: Limits,
                   delimiter: str | None, decimal: str | None) -> _Rows:
    """``text`` is ``data`` decoded (checked UTF-8, BOM removed)."""
    settings, start = _split_comment_header(text, label)
    header_end = text.find("\n", start)
    header_line = text[start:header_end if header_end >= 0 else len(text)].rstrip("\r\n")
    if not text[start:].strip():
        raise _batch_error(label, "no_data", "no header and no data rows")
    if max(header_line.count(d) for d in CSV_DELIMITERS) + 1 > 4 * limits.max_columns:
        raise _batch_error(label, "too_many_columns", f"more than {limits.max_columns} columns")
    chosen = _csv_delimiter(header_line, delimiter)
    try:
        names = next(csv.reader([header_line], delimiter=chosen))
    except (csv.Error, StopIteration) as exc:
        raise _batch_error(label, "unparseable", f"header cannot be read: {exc}")
    try:
        columns, column_units = _known_columns(names, label, limits)
    except IntakeError as exc:
        if exc.issues[0].code == "missing_column":
            wrong = _wrong_delimiter(header_line, chosen, delimiter is not None, label)
            if wrong is not None:
                raise wrong from None
        raise

    blank_skipped = [0]
    bad_rows: list[str] = []

    def on_invalid_row(row) -> str:
        if not row.text.strip():
            blank_skipped[0] += 1
            return "skip"
        data_row = (row.number or 0) - 1 - blank_skipped[0]
        bad_rows.append(f"data row {data_row} has {row.actual_columns} fields where the header "
                        f"has {row.expected_columns}: {_short(row.text)!r}")
        return "error"

    bom = 3 if data.startswith(b"\xef\xbb\xbf") else 0
    body = pa.py_buffer(data)[bom + len(text[:start].encode("utf-8")):]  # zero-copy slice
    try:
        table = pcsv.read_csv(
            pa.BufferReader(body),
            # one block: a row never straddles blocks, whatever the header's length
            read_options=pcsv.ReadOptions(use_threads=False,
                                          block_size=max(1 << 20, min(body.size + 1, 1 << 30))),
            parse_options=pcsv.ParseOptions(delimiter=chosen, invalid_row_handler=on_invalid_row),
            convert_options=pcsv.ConvertOptions(
                column_types={original: pa.string() for original in columns.values()},
                include_columns=list(columns.values()),
                strings_can_be_null=False),
        )
    except (pa.ArrowException, ValueError) as exc:
        if bad_rows:
            raise _batch_error(label, "malformed_row", bad_rows[0])
        raise _batch_error(label, "unparseable", f"CSV cannot be parsed: {_short(exc, 200)}")
    if table.num_rows == 0:
        raise _batch_error(label, "no_data", "the file has a header but no data rows")
    if table.num_rows > limits.max_rows:
        raise _batch_error(label, "input_too_large", f"the file holds {table.num_rows} rows, "
                           f"limit {limits.max_rows}")
    rows = _rows_from_table(table, columns, column_units, "csv", label,
                            _csv_decimal(table, columns, chosen, decimal))
    rows.settings = settings
    return rows


def _known_columns(names: list[str], label: str,
                   limits: Limits) -> tuple[dict[str, str], dict[str, str | None]]:
    """Map each known column (internal name) to its name in the input; and each
    quantity present to the unit its column name carries (None: plain)."""
    if len(names) > limits.max_columns:
        raise _batch_error(label, "too_many_columns",
                           f"{len(names)} columns, limit {limits.max_columns}")
    found: dict[str, str] = {}
    column_units: dict[str, str | None] = {}
    for original in names:
        name = str(original).strip().lower()
        if name in OLD_SPELLINGS:
            raise _old_spelling(name, "column", label)
        try:
            quantity = units.unit_column(name)
        except units.UnknownColumnUnit as exc:
            raise _batch_error(label, "unknown_unit", str(exc), fld=exc.column)
        key = quantity[0] if quantity else name
        if quantity is None and name not in PLAIN_COLUMNS:
            continue
        if key in found:
            if str(found[key]).strip().lower() == name:
                raise _batch_error(label, "duplicate_column", f"column {name!r} appears twice", fld=name)
            raise _batch_error(label, "conflicting_columns",
                               f"columns {str(found[key]).strip()!r} and {str(original).strip()!r} "
                               f"both give the {key.replace('_', ' ')}; keep one", fld=key)
        found[key] = original
        if quantity:
            column_units[key] = quantity[1]
    missing = [c for c in IDENTITY_COLUMNS + REQUIRED_QUANTITIES if c not in found]
    if missing:
        present = [str(n).strip().lower() for n in names]
        hints = []
        for col in missing:
            near = _nearest(col, [p for p in present if p not in found.values()])
            if col in REQUIRED_QUANTITIES:
                example = "pressure_kpa" if col == "pressure" else "loading_mmol_per_g"
                hints.append(f"a {col} column (e.g. {example}, or {col!r} with a units declaration)"
                             + (f" (found {near!r})" if near else ""))
            else:
                hints.append(f"{col!r}" + (f" (found {near!r})" if near else ""))
        raise _batch_error(label, "missing_column", "missing required column(s): " + ", ".join(hints),
                           fld=missing[0])
    return found, column_units


def _rows_from_table(table: pa.Table, columns: dict[str, str], column_units: dict[str, str | None],
                     source: str, label: str, decimal: str = ".") -> _Rows:
    text: dict[str, _Text] = {}
    numbers: dict[str, _Numbers] = {}
    for name, original in columns.items():
        column = table.column(original).combine_chunks()
        if name in TEXT_FIELDS:
            text[name] = _text_from_arrow(_as_strings(column, name, label))
        elif pa.types.is_integer(column.type) or pa.types.is_floating(column.type) \
                or pa.types.is_decimal(column.type):
            numbers[name] = _numbers_from_arrow_numeric(column)
        else:
            numbers[name] = _numbers_from_strings(_as_strings(column, name, label), decimal)
    n = table.num_rows
    for quantity, unit in column_units.items():
        # one unit per column: every row carries it (blank for a plain column)
        text[UNIT_FIELD[quantity]] = _Text(np.full(n, _BLANK if unit is None else 0, dtype=np.int64),
                                           [] if unit is None else [unit])
    return _Rows(source=source, n_rows=n, text=text, numbers=numbers,
                 row_label=np.arange(1, n + 1),
                 column_names={k: str(v).strip() for k, v in columns.items()}, decimal=decimal)


def _as_strings(column: pa.Array, name: str, label: str) -> pa.Array:
    if pa.types.is_dictionary(column.type):
        column = column.dictionary_decode()
    if not (pa.types.is_string(column.type) or pa.types.is_large_string(column.type)):
        try:
            column = pc.cast(column, pa.string())
        except pa.ArrowException:
            raise _batch_error(label, "unsupported_column_type",
                               f"column {name!r} has type {column.type}, expected text or numbers",
                               fld=name)
    return pc.utf8_trim_whitespace(column.fill_null(""))


def _text_from_arrow(strings: pa.Array) -> _Text:
    encoded = pc.dictionary_encode(strings)
    values = encoded.dictionary.to_pylist()
    codes = encoded.indices.to_numpy(zero_copy_only=False).astype(np.int64)
    if "" in values:
        codes[codes == values.index("")] = _BLANK
    return _Text(codes, values)


def _numbers_from_strings(strings: pa.Array, decimal: str = ".") -> _Numbers:
    if decimal == ",":
        # a point in a decimal-comma file is not read: it may be a thousands separator
        with_point = pc.match_substring(strings, ".").to_numpy(zero_copy_only=False)
        strings_read = pc.if_else(pa.array(with_point), pa.scalar("?", pa.string()),
                                  pc.replace_substring(strings, ",", "."))
    else:
        strings_read = strings
    finite = pc.match_substring_regex(strings_read, _FINITE_NUMBER_RE).to_numpy(zero_copy_only=False)
    parsed = pc.cast(pc.if_else(pa.array(finite), strings_read, pa.scalar(None, pa.string())),
                     pa.float64())
    value = parsed.to_numpy(zero_copy_only=False).astype(float)
    problem = np.full(len(strings), _NOT_NUMBER, dtype=np.int8)
    if not finite.all():
        problem[pc.match_substring_regex(strings, _NON_FINITE_RE).to_numpy(zero_copy_only=False)] = \
            _NOT_FINITE
    problem[finite] = _OK
    problem[finite & ~np.isfinite(value)] = _NOT_FINITE          # e.g. 1e999
    problem[pc.equal(strings, "").to_numpy(zero_copy_only=False)] = _MISSING
    value[problem != _OK] = np.nan
    return _Numbers(value, problem, lambda i, s=strings: s[i].as_py())


def _numbers_from_arrow_numeric(column: pa.Array) -> _Numbers:
    # unsafe: integers past 2**53 (up to 2**64) become the nearest float, which the range
    # checks then report by row, rather than the cast failing for the whole file
    value = pc.cast(column, pa.float64(), safe=False).to_numpy(zero_copy_only=False).astype(float)
    problem = np.zeros(len(value), dtype=np.int8)
    problem[~np.isfinite(value)] = _NOT_FINITE
    problem[column.is_null().to_numpy(zero_copy_only=False)] = _MISSING
    value[problem != _OK] = np.nan
    return _Numbers(value, problem, lambda i, c=column: c[i].as_py())


# ---------------------------------------------------------------------------
# Parquet

def _rows_from_parquet(data: bytes, label: str, limits: Limits) -> _Rows:
    """Rows of a Parquet file; its footer is checked against the limits first, since a
    few hundred KB of run-length-encoded data can hold tens of millions of rows."""
    try:
        parquet = pq.ParquetFile(pa.BufferReader(data))
        metadata, names = parquet.metadata, parquet.schema_arrow.names
    except Exception as exc:  # noqa: BLE001 - any reader failure means "not readable"
        raise _batch_error(label, "unparseable", f"Parquet cannot be read: {_arrow_message(exc)}")
    if metadata.num_rows > limits.max_rows:
        raise _batch_error(label, "input_too_large", f"the file holds {metadata.num_rows} rows, "
                           f"limit {limits.max_rows}")
    uncompressed = sum(metadata.row_group(i).total_byte_size for i in range(metadata.num_row_groups))
    if uncompressed > limits.max_bytes:
        raise _batch_error(label, "input_too_large", f"the file's data are {uncompressed} bytes "
                           f"uncompressed, limit {limits.max_bytes}")
    columns, _ = _known_columns(names, label, limits)   # duplicates, missing columns
    try:
        # only the known columns: the others may be of any type or size
        table = parquet.read(columns=list(columns.values()), use_threads=False)
    except Exception as exc:  # noqa: BLE001 - any reader failure means "not readable"
        raise _batch_error(label, "unparseable", f"Parquet cannot be read: {_arrow_message(exc)}")
    return _rows_from_arrow_table(table, "parquet", label, limits)


def _arrow_message(exc: Exception) -> str:
    """The first line of a reader's error: later lines dump the reader's internal schema."""
    return _short(str(exc).strip().split("\n", 1)[0], 200)


def _rows_from_arrow_table(table: pa.Table, source: str, label: str, limits: Limits) -> _Rows:
    """Rows of a Parquet file's table or of a pyarrow.Table handed over directly."""
    columns, column_units = _known_columns(table.column_names, label, limits)
    for name, original in columns.items():
        kind = table.schema.field(original).type
        if pa.types.is_nested(kind) or pa.types.is_binary(kind):
            raise _batch_error(label, "unsupported_column_type",
                               f"column {name!r} has type {kind}, expected text or numbers", fld=name)
    if table.num_rows == 0:
        raise _batch_error(label, "no_data", "the table has no rows")
    if table.num_rows > limits.max_rows:
        raise _batch_error(label, "input_too_large", f"the table holds {table.num_rows} rows, "
                           f"limit {limits.max_rows}")
    rows = _rows_from_table(table, columns, column_units, source, label)
    metadata = table.schema.metadata or {}
    for key, value in metadata.items():
        name = key.decode("utf-8", "replace").strip().lower()
        text = value.decode("utf-8", "replace")
        if name in OLD_SPELLINGS:
            raise _old_spelling(name, "metadata key", label)
        if name == "gases":
            try:
                rows.settings[name] = json.loads(text)
            except ValueError:
                raise _batch_error(label, "invalid_gas", "metadata 'gases' must be a JSON list of "
                                   "gas objects", fld="gases")
        elif name in SETTINGS:
            rows.settings[name] = text
    return rows


# ---------------------------------------------------------------------------
# JSON

def _parsed_json(text: str, label: str, limits: Limits) -> dict:
    if len(text) > limits.max_json_bytes:  # characters >= bytes / 4: a cheap, safe bound first
        raise _batch_error(label, "input_too_large",
                           f"a JSON batch may hold at most {limits.max_json_bytes} bytes "
                           f"(this one holds at least {len(text)} characters); send large "
                           "batches as Parquet or CSV, which are read column-wise")
    _check_depth(text, label, limits.max_json_depth)
    try:
        doc = json.loads(text)
    except (ValueError, RecursionError) as exc:
        raise _batch_error(label, "unparseable", f"JSON cannot be parsed: {_short(exc, 200)}")
    if not isinstance(doc, dict):
        raise _batch_error(label, "wrong_type", "the JSON document must be an object")
    allowed = ("batch_label", "units", "sample_mass_g", "gases", "isotherms", "conditions", "mixtures")
    for key in doc:
        if key in OLD_SPELLINGS:
            raise _old_spelling(key, "top-level key", label)
        if key not in allowed:
            near = _nearest(key, allowed)
            raise _batch_error(label, "unknown_field", f"unknown top-level key {_short(key)!r}"
                               + (f"; did you mean {near!r}?" if near else ""), fld=_short(key))
    if not isinstance(doc.get("isotherms"), list):
        raise _batch_error(label, "wrong_type" if "isotherms" in doc else "missing_column",
                           "'isotherms' must be a list of isotherm objects", fld="isotherms")
    return doc


def _check_depth(text: str, label: str, max_depth: int) -> None:
    """Refuse nesting deeper than ``max_depth`` before the parser recurses."""
    brackets = np.frombuffer(text.encode("utf-8"), dtype=np.uint8)
    opening = (brackets == ord("[")) | (brackets == ord("{"))
    closing = (brackets == ord("]")) | (brackets == ord("}"))
    if not opening.any():
        return
    # brackets inside strings count too, so this is an upper bound on depth;
    # the schema never needs more than a handful of levels
    depth = np.cumsum(opening.astype(np.int64) - closing.astype(np.int64))
    if depth.max() > max_depth:
        raise _batch_error(label, "too_deeply_nested",
                           f"JSON nests deeper than {max_depth} levels")


def _rows_from_json(doc: dict, label: str, limits: Limits) -> _Rows:
    items = doc["isotherms"]
    if len(items) > limits.max_isotherms:
        raise _batch_error(label, "too_many_isotherms",
                           f"{len(items)} isotherms, limit {limits.max_isotherms}")
    if not items:
        raise _batch_error(label, "no_data", "'isotherms' is empty")
    builder = _JsonRows(limits, label)
    for index, item in enumerate(items):
        builder.add(index, item)
    rows = builder.rows()
    rows.settings = {key: doc[key] for key in SETTINGS if doc.get(key) is not None}
    return rows


def _json_number(value: Any) -> tuple[float, int]:
    if value is None:
        return math.nan, _MISSING
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return math.nan, _NOT_NUMBER
    try:
        number = float(value)
    except OverflowError:
        return math.nan, _NOT_FINITE
    return (number, _OK) if math.isfinite(number) else (math.nan, _NOT_FINITE)


def _json_numbers(values: list) -> tuple[np.ndarray, np.ndarray]:
    if set(map(type, values)) <= {int, float}:  # bool is excluded: its type is bool
        try:
            array = np.array(values, dtype=float)
            problem = np.where(np.isfinite(array), _OK, _NOT_FINITE).astype(np.int8)
            return np.where(problem == _OK, array, np.nan), problem
        except OverflowError:
            pass
    pairs = [_json_number(v) for v in values]
    return (np.array([p[0] for p in pairs], dtype=float),
            np.array([p[1] for p in pairs], dtype=np.int8))


class _JsonRows:
    """Accumulates JSON isotherm objects into the column-wise _Rows form.

    Isotherm-level values are kept once per isotherm and repeated over its
    points at the end, so the work per point stays inside numpy. Each isotherm
    names its own pressure/loading keys, so each may carry its own units.
    """

    SCALAR_NUMBERS = ("temperature_k", "saturation_pressure", "sample_mass_g", "surface_area_m2_per_g")
    ARRAYS = ("pressure", "loading", "loading_sigma")
    UNIT_TEXT = tuple(UNIT_FIELD.values())

    def __init__(self, limits: Limits, label: str):
        self.limits = limits
        self.label = label
        self.total_points = 0
        self.text_fields = TEXT_FIELDS + self.UNIT_TEXT
        self.text_code: dict[str, list[int]] = {f: [] for f in self.text_fields}
        self.text_values: dict[str, dict[str, int]] = {f: {} for f in self.text_fields}
        self.scalar: dict[str, list[tuple[float, int]]] = {f: [] for f in self.SCALAR_NUMBERS}
        self.scalar_raw: dict[str, list] = {f: [] for f in self.SCALAR_NUMBERS}
        self.array: dict[str, list[tuple[np.ndarray, np.ndarray]]] = {f: [] for f in self.ARRAYS}
        self.array_raw: dict[str, list] = {f: [] for f in self.ARRAYS}
        self.n_points: list[int] = []
        self.names: list[str] = []
        self.column_names: list[dict[str, str]] = []
        self.issues: list[tuple[int, str | None, str, str]] = []

    def _quantity_keys(self, index: int, item: dict) -> tuple[dict[str, str], dict[str, str]]:
        """Per quantity: the key this isotherm uses, and the unit its name carries."""
        keys: dict[str, str] = {}
        key_units: dict[str, str] = {}
        for key in item:
            name = str(key).strip().lower()
            if name in OLD_SPELLINGS and name != "defaults":
                self.issues.append((index, name, "old_spelling",
                                    f"{name!r} is no longer read: use {OLD_SPELLINGS[name]}"))
                continue
            try:
                found = units.unit_column(name)
            except units.UnknownColumnUnit as exc:
                self.issues.append((index, exc.column, "unknown_unit", str(exc)))
                continue
            if found is None:
                continue
            quantity, unit = found
            if quantity in keys:
                self.issues.append((index, quantity, "conflicting_columns",
                                    f"keys {keys[quantity]!r} and {key!r} both give the "
                                    f"{quantity.replace('_', ' ')}; keep one"))
                continue
            keys[quantity] = key
            if unit is not None:
                key_units[quantity] = unit
        return keys, key_units

    def _own_units(self, index: int, item: dict) -> dict[str, str]:
        raw = item.get("units")
        if raw is None:
            return {}
        try:
            return units.parse_units_declaration(raw)
        except ValueError as exc:
            code = "unknown_unit" if isinstance(exc, units.UnknownUnit) else "wrong_type"
            self.issues.append((index, "units", code, f"'units': {exc}"))
            return {}

    def add(self, index: int, item: Any) -> None:
        name = f"isotherms[{index}]"
        if isinstance(item, dict):
            given = item.get("isotherm_id")
            if isinstance(given, str) and given.strip() and _id_problem(given.strip()) is None:
                name = given.strip()
        self.names.append(name)
        if not isinstance(item, dict):
            self.issues.append((index, None, "wrong_type", "an isotherm must be a JSON object"))
            item = {"pressure": [], "loading": []}  # nothing more to report about it
        keys, key_units = self._quantity_keys(index, item)
        self.column_names.append(dict(keys))
        own_units = {**self._own_units(index, item), **key_units}
        arrays = {q: self._array(index, q, keys.get(q), item) for q in self.ARRAYS}
        pressure_key = keys.get("pressure", "pressure")
        n = min(len(arrays["pressure"]), len(arrays["loading"]))
        for q in ("loading", "loading_sigma"):
            if arrays[q] is not None and len(arrays[q]) != len(arrays["pressure"]):
                self.issues.append((index, q, "length_mismatch",
                                    f"{keys.get(q, q)!r} has {len(arrays[q])} values, "
                                    f"{pressure_key!r} has {len(arrays['pressure'])}"))
        if arrays["loading_sigma"] is not None:
            n = min(n, len(arrays["loading_sigma"]))
        if n > self.limits.max_points_per_isotherm:
            self.issues.append((index, None, "too_many_points",
                                f"{n} points, limit {self.limits.max_points_per_isotherm}"))
            n = 0
        self.n_points.append(n)
        self.total_points += n
        if self.total_points > self.limits.max_rows:
            raise _batch_error(self.label, "input_too_large", f"the isotherms hold more than "
                               f"{self.limits.max_rows} points, limit {self.limits.max_rows}")
        for key in TEXT_FIELDS:
            self.text_code[key].append(self._text_code(index, key, item.get(key)))
        for quantity, fld in UNIT_FIELD.items():
            unit = own_units.get(quantity)
            self.text_code[fld].append(_BLANK if unit is None else
                                       self.text_values[fld].setdefault(unit, len(self.text_values[fld])))
        for key in self.SCALAR_NUMBERS:
            value = item.get(keys.get(key, key))
            self.scalar[key].append(_json_number(value))
            self.scalar_raw[key].append(value)
        for key in self.ARRAYS:
            values = arrays[key]
            if values is None:  # optional sigma absent: every point missing
                values = [None] * n
                self.array[key].append((np.full(n, np.nan), np.full(n, _MISSING, dtype=np.int8)))
            else:
                values = values[:n]
                self.array[key].append(_json_numbers(values))
            self.array_raw[key].append(values)

    def _array(self, index: int, quantity: str, key: str | None, item: dict) -> list | None:
        value = item.get(key) if key is not None else None
        if isinstance(value, list):
            return value
        if value is None:
            if quantity == "loading_sigma":
                return None
            example = "pressure_kpa" if quantity == "pressure" else "loading_mmol_per_g"
            self.issues.append((index, quantity, "missing_value",
                                f"{key or quantity!r} is missing (a list of numbers, e.g. "
                                f"{example!r}, or {quantity!r} with units)"))
        else:
            self.issues.append((index, quantity, "wrong_type", f"{key!r} must be a list of numbers"))
        return None if quantity == "loading_sigma" else []

    def _text_code(self, index: int, key: str, value: Any) -> int:
        if value is None:
            return _BLANK
        if isinstance(value, int) and not isinstance(value, bool):
            value = str(value)
        if not isinstance(value, str):
            self.issues.append((index, key, "wrong_type", f"{key!r} must be text"))
            return _WRONG_TYPE
        value = value.strip()
        if not value:
            return _BLANK
        return self.text_values[key].setdefault(value, len(self.text_values[key]))

    def rows(self) -> _Rows:
        counts = np.array(self.n_points, dtype=np.int64)
        group = np.repeat(np.arange(counts.size), counts)
        point = np.arange(group.size) - np.repeat(np.cumsum(counts) - counts, counts)
        text = {k: _Text(np.repeat(np.array(self.text_code[k], dtype=np.int64), counts),
                         list(self.text_values[k])) for k in self.text_fields}
        numbers = {}
        for k in self.SCALAR_NUMBERS:
            pairs = self.scalar[k]
            numbers[k] = _Numbers(
                np.repeat(np.array([v for v, _ in pairs], dtype=float), counts),
                np.repeat(np.array([c for _, c in pairs], dtype=np.int8), counts),
                lambda i, r=self.scalar_raw[k]: _json_text(r[group[i]]))
        for k in self.ARRAYS:
            parts = self.array[k]
            numbers[k] = _Numbers(
                np.concatenate([v for v, _ in parts]) if parts else np.empty(0),
                np.concatenate([c for _, c in parts]) if parts else np.empty(0, np.int8),
                lambda i, r=self.array_raw[k]: _json_text(r[group[i]][point[i]]))
        return _Rows(source="json", n_rows=int(group.size), text=text, numbers=numbers,
                     row_label=point, group=group, n_groups=len(self.names), group_names=self.names,
                     isotherm_level=frozenset(TEXT_FIELDS + self.SCALAR_NUMBERS + self.UNIT_TEXT),
                     group_issues=self.issues, group_column_names=self.column_names)


def _json_text(value: Any) -> str:
    """A JSON value as the sender wrote it (floats as Python prints NaN/inf)."""
    try:
        return _short(repr(value) if isinstance(value, float) else json.dumps(value))
    except (ValueError, RecursionError):
        return "(unprintable value)"


# ---------------------------------------------------------------------------
# validation and normalisation, column-wise

class _Findings:
    """Problems found so far: per row (arrays) and per isotherm."""

    def __init__(self, rows: _Rows, gid: np.ndarray, n_groups: int):
        self.rows = rows
        self.gid = gid
        self.n_groups = n_groups
        self.row_checks: list[tuple[np.ndarray, str, str, Callable[[int], str], bool]] = []
        self.group_checks: list[tuple[int, str | None, str, str]] = []

    def rows_where(self, mask: np.ndarray, fld: str, code: str, detail: Callable[[int], str],
                   once: bool = False) -> None:
        """Record ``code`` for every row in ``mask`` (only the first per isotherm if ``once``)."""
        index = np.flatnonzero(mask)
        if index.size == 0:
            return
        if once or fld in self.rows.isotherm_level:
            _, first = np.unique(self.gid[index], return_index=True)
            index = index[first]
        self.row_checks.append((index, fld, code, detail, once))

    def groups_where(self, mask: np.ndarray, fld: str | None, code: str,
                     detail: Callable[[int], str]) -> None:
        for g in np.flatnonzero(mask):
            self.group_checks.append((int(g), fld, code, detail(int(g))))

    def bad_groups(self) -> np.ndarray:
        bad = np.zeros(self.n_groups, dtype=bool)
        for index, *_ in self.row_checks:
            bad[self.gid[index]] = True
        for g, *_ in self.group_checks + self.rows.group_issues:
            bad[g] = True
        return bad


def _group_range(values: np.ndarray, given: np.ndarray, gid: np.ndarray, n_groups: int):
    """Per-group (min, max) of ``values`` over rows where ``given``; (inf, -inf) if none."""
    low = np.full(n_groups, np.inf)
    high = np.full(n_groups, -np.inf)
    np.minimum.at(low, gid[given], values[given])
    np.maximum.at(high, gid[given], values[given])
    return low, high


def _codes_by_appearance(values: np.ndarray) -> tuple[np.ndarray, int]:
    """Small integer codes for ``values`` numbered by first appearance (nan -> -1)."""
    encoded = pc.dictionary_encode(pa.array(values, from_pandas=True))
    codes = encoded.indices.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)
    return codes, len(encoded.dictionary)


def _grouping(rows: _Rows, branch_key: np.ndarray) -> tuple[np.ndarray, int]:
    """Group index per row (groups numbered by first appearance) and group count."""
    if rows.group is not None:
        return rows.group, rows.n_groups
    n = rows.n_rows
    temperature_code, _ = _codes_by_appearance(rows.numbers["temperature_k"].value)
    key = np.zeros(n, dtype=np.int64)
    for column in (rows.text["sorbent_id"].codes, rows.text["adsorbate"].codes,
                   temperature_code, branch_key):
        # re-coding after each step keeps the combined key below n: no overflow
        shifted = column - column.min()
        key, _ = _codes_by_appearance(key * (int(shifted.max()) + 1) + shifted)
    iso = rows.text["isotherm_id"].codes if "isotherm_id" in rows.text else np.full(n, _BLANK)
    key = np.where(iso >= 0, iso, iso.max() + 1 + key)  # rows with an isotherm_id group by it alone
    return _codes_by_appearance(key)


def _branch_codes(column: _Text) -> tuple[np.ndarray, np.ndarray]:
    """Per row: index into BRANCHES (blank means adsorption, -1 unknown) and the
    grouping key (unknown values keep a key of their own)."""
    branch_of_value = np.array([BRANCHES.index(v.lower()) if v.lower() in BRANCHES else -1
                                for v in column.values] + [0, 0, 0], dtype=np.int64)
    branch = branch_of_value[column.codes]
    return branch, np.where(branch >= 0, branch, 2 + column.codes)


# a clear up-then-down sequence: this many distinct pressures on each side of the turn
MIN_BRANCH_PRESSURES = 3


def _split_at_turning_point(rows: _Rows, text: dict, gid: np.ndarray) -> _Text:
    """The branch column with "desorption" on the rows after the pressure turning point
    of every isotherm that qualifies (module docstring: branches from the pressure
    sequence); the column as it was where none does."""
    column = text["branch"]
    pressure = rows.numbers["pressure"]
    n = gid.size
    if n < 2 * MIN_BRANCH_PRESSURES:
        return column
    n_groups = int(gid.max()) + 1
    iso = text["isotherm_id"].codes
    # only isotherms that say nothing about their branch or identity, with every pressure usable
    eligible = np.bincount(gid, weights=(column.codes != _BLANK) | (iso >= 0)
                           | (pressure.problem != _OK), minlength=n_groups) == 0
    order = np.argsort(gid, kind="stable")        # input order inside each isotherm
    g, p = gid[order], pressure.value[order]
    same = g[1:] == g[:-1]
    rise, fall = same & (p[1:] > p[:-1]), same & (p[1:] < p[:-1])
    # a rise after a fall: not one turn
    falls_so_far = np.cumsum(fall)
    start_of_group = np.concatenate([[0], np.flatnonzero(~same) + 1])
    falls_before_group = np.concatenate([[0], falls_so_far])[start_of_group]
    falls_before = falls_so_far - falls_before_group[g[1:]]
    rise_after_fall = np.bincount(g[1:], weights=rise & (falls_before - fall > 0), minlength=n_groups)
    n_rise = np.bincount(g[1:], weights=rise, minlength=n_groups)
    n_fall = np.bincount(g[1:], weights=fall, minlength=n_groups)
    # distinct pressures: 1 + rises up to the top; one per fall after it
    split = eligible & (rise_after_fall == 0) & (n_rise + 1 >= MIN_BRANCH_PRESSURES) \
        & (n_fall >= MIN_BRANCH_PRESSURES)
    if not split.any():
        return column
    after_turn = np.zeros(n, dtype=bool)
    after_turn[1:] = split[g[1:]] & (falls_before > 0)
    values = list(column.values)
    if "desorption" not in values:
        values.append("desorption")
    codes = column.codes.copy()
    codes[order[after_turn]] = values.index("desorption")
    return _Text(codes, values)


def _resolved_text(rows: _Rows, name: str, default: str | None) -> _Text:
    """The text column ``name`` with blanks filled by the batch-wide ``default``."""
    column = rows.text.get(name) or _Text(np.full(rows.n_rows, _BLANK, dtype=np.int64), [])
    if default is None:
        return column
    values = list(column.values)
    if default not in values:
        values.append(default)
    codes = column.codes.copy()
    codes[codes == _BLANK] = values.index(default)
    return _Text(codes, values)


def _unit_index(column: _Text, table: list[str]) -> np.ndarray:
    """Per-row index into ``table`` of canonical unit names (the column holds only
    checked canonical names), -1 where blank."""
    per_value = np.array([table.index(v) for v in column.values] + [-1, -1, -1], dtype=np.int64)
    return per_value[column.codes]


def _loading_factor(unit: np.ndarray, table: list[str], molar_mass, mass_g) -> np.ndarray:
    """Per row: mol/kg per unit of the row's loading unit (nan where unknown)."""
    factor = np.full(unit.size, np.nan)
    for index, unit_name in enumerate(table):
        rows_in_unit = unit == index
        if rows_in_unit.any():
            factor[rows_in_unit] = units.loading_to_mol_per_kg(
                1.0, unit_name, molar_mass[rows_in_unit], mass_g[rows_in_unit])
    return factor


def _assemble(rows: _Rows, settings: dict, declared: list, label: str, limits: Limits) -> Batch:
    n = rows.n_rows
    number = rows.numbers
    for name in NUMBER_FIELDS:  # absent optional columns: every cell missing
        number.setdefault(name, _Numbers(np.full(n, np.nan), np.full(n, _MISSING, np.int8),
                                         lambda i: None))
    if "sample_mass_g" in settings:
        mass = number["sample_mass_g"]
        fill = mass.problem == _MISSING
        mass.value = np.where(fill, settings["sample_mass_g"], mass.value)
        mass.problem = np.where(fill, _OK, mass.problem).astype(np.int8)
    text = {name: rows.text.get(name) or _Text(np.full(n, _BLANK, dtype=np.int64), [])
            for name in TEXT_FIELDS}
    declared_units = settings.get("units", {})
    for quantity, fld in UNIT_FIELD.items():
        text[fld] = _resolved_text(rows, fld, declared_units.get(quantity))

    branch, branch_key = _branch_codes(text["branch"])
    if rows.group is None:
        text["branch"] = _split_at_turning_point(rows, text, _grouping(rows, branch_key)[0])
        branch, branch_key = _branch_codes(text["branch"])

    gid, n_groups = _grouping(rows, branch_key)
    if n_groups > limits.max_isotherms:
        raise _batch_error(label, "too_many_isotherms",
                           f"{n_groups} isotherms, limit {limits.max_isotherms}")
    found = _Findings(rows, gid, n_groups)
    names = _GroupNames(rows, text, gid)

    # adsorbate per row
    known = [_lookup(v, declared) for v in text["adsorbate"].values]
    table = [a for a in dict.fromkeys(a for a in known if a is not None)]
    ads_of_value = np.array([table.index(a) if a is not None else -1 for a in known] + [-2, -2, -2],
                            dtype=np.int64)
    ads = ads_of_value[text["adsorbate"].codes]
    molar_mass = np.array([a.molar_mass_g_per_mol for a in table] + [np.nan])[
        np.where(ads >= 0, ads, len(table))]

    p_table = list(units.PRESSURE_PA_PER_UNIT)
    l_table = list(units.LOADING_UNIT_TABLE)
    relative_unit = p_table.index(units.RELATIVE)
    p_unit = _unit_index(text[UNIT_FIELD["pressure"]], p_table)
    l_unit = _unit_index(text[UNIT_FIELD["loading"]], l_table)
    is_relative = p_unit == relative_unit
    # a plain saturation pressure is in the pressure unit, if that is absolute;
    # a plain loading_sigma in the loading unit
    p0_unit = _unit_index(text[UNIT_FIELD["saturation_pressure"]], p_table)
    p0_unit = np.where((p0_unit < 0) & ~is_relative, p_unit, p0_unit)
    sigma_unit = _unit_index(text[UNIT_FIELD["loading_sigma"]], l_table)
    sigma_unit = np.where(sigma_unit < 0, l_unit, sigma_unit)

    _row_checks(found, rows, text, number, branch, ads, is_relative)

    # isotherm-level values: each must be the same on every row that gives it
    pa_per_unit_of = np.array([np.nan if f is None else f for f in units.PRESSURE_PA_PER_UNIT.values()]
                              + [np.nan])
    pa_per_unit = pa_per_unit_of[p_unit]
    with np.errstate(over="ignore"):  # an overflow is reported by _range_checks
        p0_row = number["saturation_pressure"].value * pa_per_unit_of[p0_unit]
    group_value = {}
    for fld, values, given, code in [
        ("sorbent_id", text["sorbent_id"].codes, text["sorbent_id"].codes >= 0, "inconsistent_value"),
        ("adsorbate", text["adsorbate"].codes, text["adsorbate"].codes >= 0, "inconsistent_value"),
        ("temperature_k", number["temperature_k"].value, number["temperature_k"].problem == _OK,
         "inconsistent_value"),
        ("branch", branch_key, np.ones(n, dtype=bool), "inconsistent_value"),
        ("saturation_pressure", p0_row, np.isfinite(p0_row), "inconsistent_value"),
        ("sample_mass_g", number["sample_mass_g"].value, number["sample_mass_g"].problem == _OK,
         "inconsistent_value"),
        ("surface_area_m2_per_g", number["surface_area_m2_per_g"].value,
         number["surface_area_m2_per_g"].problem == _OK, "inconsistent_value"),
    ]:
        low, high = _group_range(values.astype(float), given, gid, n_groups)
        found.groups_where(high > low, fld, code,
                           lambda g, f=fld: f"rows of this isotherm give different values for "
                                            f"{rows.field_name(f, g)!r}")
        group_value[fld] = np.where(np.isfinite(low), low, np.nan)

    # units: one per quantity and isotherm (a JSON isotherm's own, else the batch's)
    for quantity, unit, needed in (
            ("pressure", p_unit, np.ones(n, dtype=bool)),
            ("loading", l_unit, np.ones(n, dtype=bool)),
            ("saturation_pressure", p0_unit, number["saturation_pressure"].problem == _OK)):
        missing = np.bincount(gid, weights=needed & (unit < 0), minlength=n_groups) > 0
        found.groups_where(missing, quantity, "missing_unit",
                           lambda g, q=quantity: _missing_unit(q, rows.field_name(q, g)))

    sigma_given = number["loading_sigma"].problem == _OK
    n_sigma = np.bincount(gid, weights=sigma_given, minlength=n_groups)
    counts = np.bincount(gid, minlength=n_groups)
    found.groups_where((n_sigma > 0) & (n_sigma < counts), "loading_sigma", "missing_value",
                       lambda g: "loading_sigma is given for some points but not all")
    found.groups_where(counts > limits.max_points_per_isotherm, None, "too_many_points",
                       lambda g: f"{counts[g]} points, limit {limits.max_points_per_isotherm}")

    # saturation pressure: given, else from the property table
    temperature_g = group_value["temperature_k"]
    ads_index_g = np.full(n_groups, -1, dtype=np.int64)
    low, _ = _group_range(ads.astype(float), ads >= 0, gid, n_groups)
    ads_index_g[np.isfinite(low)] = low[np.isfinite(low)].astype(np.int64)
    p0_g = group_value["saturation_pressure"].copy()
    for g in np.flatnonzero(np.isnan(p0_g) & (ads_index_g >= 0) & np.isfinite(temperature_g)):
        computed = adsorbates.relative_pressure_p0_pa(table[ads_index_g[g]], temperature_g[g])
        p0_g[g] = np.nan if computed is None else computed
    relative_g = _group_range(is_relative.astype(float), p_unit >= 0, gid, n_groups)[1] == 1.0
    p0_sent_g = np.bincount(gid, weights=number["saturation_pressure"].problem == _OK,
                            minlength=n_groups) > 0   # sent without a usable unit: reported above
    found.groups_where(relative_g & np.isnan(p0_g) & ~p0_sent_g & (ads_index_g >= 0)
                       & np.isfinite(temperature_g),
                       "saturation_pressure", "missing_saturation_pressure",
                       lambda g: _missing_p0(table[ads_index_g[g]], temperature_g[g],
                                             adsorbates.lookup(table[ads_index_g[g]].id) is None))
    absolute_g = np.zeros(n_groups, dtype=bool)
    for index, unit_name in enumerate(l_table):
        if not units.LOADING_UNIT_TABLE[unit_name].per_kg_sorbent:
            absolute_g[np.unique(gid[(l_unit == index) | (sigma_given & (sigma_unit == index))])] = True
    mass_g = group_value["sample_mass_g"]
    found.groups_where(absolute_g & np.isnan(mass_g), "sample_mass_g", "missing_sample_mass",
                       lambda g: "the loading unit is an absolute amount; 'sample_mass_g' is needed "
                                 "to express it per mass of sorbent")

    # canonical values per row
    with np.errstate(all="ignore"):
        pressure_pa = number["pressure"].value * np.where(is_relative, p0_g[gid], pa_per_unit)
        loading = number["loading"].value * _loading_factor(l_unit, l_table, molar_mass, mass_g[gid])
        sigma = number["loading_sigma"].value * _loading_factor(sigma_unit, l_table, molar_mass,
                                                                mass_g[gid])
    unit_names = {"pressure": (np.array(p_table + [""]), p_unit),
                  "saturation_pressure": (np.array(p_table + [""]), p0_unit),
                  "loading": (np.array(l_table + [""]), l_unit),
                  "loading_sigma": (np.array(l_table + [""]), sigma_unit)}
    _range_checks(found, number, unit_names, {
        "temperature_k": (number["temperature_k"].value, "K", units.MAX_TEMPERATURE_K),
        "pressure": (pressure_pa, "Pa", units.MAX_PRESSURE_PA),
        "saturation_pressure": (p0_row, "Pa", units.MAX_PRESSURE_PA),
        "loading": (loading, "mol/kg", units.MAX_LOADING_MOL_PER_KG),
        "loading_sigma": (sigma, "mol/kg", units.MAX_LOADING_MOL_PER_KG),
        "surface_area_m2_per_g": (number["surface_area_m2_per_g"].value, "m2/g",
                                  units.MAX_SURFACE_AREA_M2_PER_G)})

    points = _sorted_points(gid, n_groups, pressure_pa, loading, sigma)
    found.groups_where(~found.bad_groups() & (points.n_distinct < 3), None, "too_few_points",
                       lambda g: f"{points.n_distinct[g]} distinct pressure(s); at least 3 "
                                 "are needed")
    found.groups_where(_duplicate_ids(text, gid, n_groups, rows.group is not None), "isotherm_id",
                       "duplicate_isotherm_id", lambda g: "an earlier isotherm has the same isotherm_id")

    batch = Batch(label=label)
    batch.rejected = _issues(found, names, label)
    accepted = np.flatnonzero(~found.bad_groups())
    if accepted.size == 0:
        return batch
    build = _Accepted(
        rows=rows, text=text, number=number, label=label, points=points,
        input_order=np.argsort(gid, kind="stable"),
        input_start=np.concatenate([[0], np.cumsum(counts)]),
        has_sigma=n_sigma > 0, adsorbate=[table[i] if i >= 0 else None for i in ads_index_g],
        group_value=group_value, p0_pa=p0_g, relative_input=relative_g,
        non_monotonic=_non_monotonic_groups(points, n_groups))
    seen_ids: set[str] = set()
    for g in accepted:
        try:
            iso = build.isotherm(int(g))
        except Exception as exc:  # noqa: BLE001 - one isotherm's bug must not sink the batch
            batch.rejected.append(_issue(label, names[g], None, None, "internal_error",
                                         f"could not be built ({type(exc).__name__}: {_short(exc)})"))
            continue
        if iso.isotherm_id in seen_ids:
            batch.rejected.append(_issue(label, iso.isotherm_id, None, "isotherm_id",
                                         "duplicate_isotherm_id",
                                         "an earlier isotherm has the same content and derived id"))
            continue
        seen_ids.add(iso.isotherm_id)
        batch.isotherms.append(iso)
    return batch


def _range_checks(found: _Findings, number: dict, unit_names: dict, canonical: dict) -> None:
    """Record ``out_of_range`` for every usable value whose canonical form is above its
    physical bound (``sorbrank.worker.units``), infinite after an overflowing conversion
    included: the message gives the value as sent with its unit and what it became."""
    for name, (converted, canon, bound) in canonical.items():
        sent = number[name]
        with np.errstate(invalid="ignore"):
            mask = (sent.problem == _OK) & (converted > bound)
        table, unit_index = unit_names.get(name, (None, None))

        def detail(i, sent=sent, converted=converted, canon=canon, bound=bound, table=table,
                   unit_index=unit_index):
            unit = canon if table is None else str(table[unit_index[i]])
            given = f"{sent.value[i]:g} {unit}"
            if unit == canon:
                return f"{given} is above the limit {bound:g} {canon}"
            if np.isinf(converted[i]):
                return f"{given} overflows when converted to {canon} (limit {bound:g} {canon})"
            return f"{given} is {converted[i]:.3g} {canon}, above the limit {bound:g} {canon}"
        found.rows_where(mask, name, "out_of_range", detail)


def _missing_unit(quantity: str, sent_as: str) -> str:
    if quantity == "saturation_pressure":
        return (f"no unit for {sent_as!r}: the pressures are relative, so name its unit "
                "(e.g. saturation_pressure_kpa) or declare it (units saturation_pressure:kPa)")
    return f"no unit for {sent_as!r}: {_UNITS_HINT}"


def _missing_p0(gas, temperature_k: float, is_declared: bool) -> str:
    if is_declared:
        why = f"{gas.id} is a declared gas, which has no saturation-pressure table"
    else:
        why = (f"none is defined for {gas.id} at {temperature_k:g} K (supercritical or outside "
               "the property table's range)")
    return (f"pressures are relative but no saturation pressure is given and {why}; give it "
            "in a saturation_pressure column (e.g. saturation_pressure_kpa)")


def _row_checks(found: _Findings, rows: _Rows, text, number, branch, ads, is_relative) -> None:
    """Record every per-row problem (vectorised; messages built lazily)."""
    def raw(name):
        return lambda i: f"value {_short(number[name].raw(i))!r}"

    def not_a_number(name):
        def detail(i):
            value = str(number[name].raw(i))
            if rows.decimal == ",":
                note = " (this file's numbers use decimal commas)"
            elif rows.source == "csv" and "," in value:
                note = " (this file's numbers use decimal points)"
            else:
                note = ""
            return f"value {_short(value)!r} is not a number{note}"
        return detail

    for name in ("sorbent_id", "adsorbate"):
        found.rows_where(text[name].codes == _BLANK, name, "missing_value",
                         lambda i, n=name: f"{n!r} is missing")
    for name in NUMBER_FIELDS:
        problem = number[name].problem
        required = name in ("temperature_k", "pressure", "loading")
        sent = rows.column_names.get(name, name)
        if required:
            found.rows_where(problem == _MISSING, name, "missing_value",
                             lambda i, n=sent: f"{n!r} is missing")
        found.rows_where(problem == _NOT_NUMBER, name, "not_a_number", not_a_number(name))
        found.rows_where(problem == _NOT_FINITE, name, "not_finite",
                         lambda i, r=raw(name): f"{r(i)} is not finite (NaN or infinity)")
    for name in ("pressure", "loading"):
        found.rows_where(number[name].value < 0, name, "negative_value",
                         lambda i, r=raw(name): f"{r(i)} is negative")
    for name in ("temperature_k", "saturation_pressure", "sample_mass_g", "loading_sigma",
                 "surface_area_m2_per_g"):
        found.rows_where(number[name].value <= 0, name, "non_positive_value",
                         lambda i, r=raw(name): f"{r(i)} must be greater than zero")
    found.rows_where(is_relative & (number["pressure"].value > 1.0), "pressure",
                     "relative_pressure_above_one",
                     lambda i: f"relative pressure p/p0 = {_short(number['pressure'].raw(i))} "
                               "is above 1")

    for name in ("sorbent_id", "isotherm_id"):
        column = text[name]
        problems = [_id_problem(v) for v in column.values]
        bad_value = np.array([p is not None for p in problems] + [False] * 3)
        found.rows_where(bad_value[column.codes], name, "invalid_id",
                         lambda i, c=column, p=problems, n=name:
                         f"{n} {_short(c.values[c.codes[i]])!r} {p[c.codes[i]]}", once=True)
    bad_text = {}
    for name in ("adsorbate", "branch"):
        column = text[name]
        problems = [_character_problem(v, format_characters=False) for v in column.values]
        bad_text[name] = np.array([p is not None for p in problems] + [False] * 3)[column.codes]
        found.rows_where(bad_text[name], name, "invalid_text",
                         lambda i, c=column, p=problems, n=name:
                         f"{n} {_short(c.values[c.codes[i]])!r} {p[c.codes[i]]}", once=True)
    adsorbate = text["adsorbate"]
    found.rows_where((ads == -1) & ~bad_text["adsorbate"], "adsorbate", "unknown_adsorbate",
                     lambda i: _unknown_adsorbate(adsorbate.values[adsorbate.codes[i]]), once=True)
    found.rows_where((branch == -1) & ~bad_text["branch"], "branch", "unknown_branch",
                     lambda i: f"branch {_short(text['branch'].values[text['branch'].codes[i]])!r} "
                               f"is not one of {', '.join(BRANCHES)}", once=True)


def _lookup(name: str, declared: list):
    """The Adsorbate called ``name``: a gas declared for this batch or one of the table."""
    return adsorbates.lookup(name, declared=declared) if declared else adsorbates.lookup(name)


def _unknown_adsorbate(name: str) -> str:
    near = adsorbates.suggest(name)
    return f"unknown adsorbate {_short(name)!r}" + (f"; did you mean {near!r}?" if near else "")


def _duplicate_ids(text, gid, n_groups: int, ids_per_group: bool) -> np.ndarray:
    """Groups whose given isotherm_id an earlier group already used (JSON only:
    CSV rows with one id form one group by construction)."""
    duplicate = np.zeros(n_groups, dtype=bool)
    if not ids_per_group:
        return duplicate
    codes = text["isotherm_id"].codes
    low, _ = _group_range(codes.astype(float), codes >= 0, gid, n_groups)
    seen: set[int] = set()
    for g in range(n_groups):
        if np.isfinite(low[g]):
            duplicate[g] = int(low[g]) in seen
            seen.add(int(low[g]))
    return duplicate


class _GroupNames:
    """A readable name per isotherm for issues: its id if usable, else a description.
    Built on demand, since only rejected isotherms need one."""

    def __init__(self, rows: _Rows, text, gid: np.ndarray):
        self.rows, self.text, self.gid = rows, text, gid
        self.first_row: np.ndarray | None = None

    def __getitem__(self, g: int) -> str:
        if self.rows.group_names is not None:
            return self.rows.group_names[g]
        if self.first_row is None:  # CSV/Parquet groups are never empty
            self.first_row = np.unique(self.gid, return_index=True)[1]
        r = int(self.first_row[g])
        text = self.text
        iso = text["isotherm_id"]
        if iso.codes[r] >= 0 and _id_problem(iso.values[iso.codes[r]]) is None:
            return iso.values[iso.codes[r]]
        parts = []
        for name in ("sorbent_id", "adsorbate"):
            column = text[name]
            parts.append(_short(column.values[column.codes[r]], 40) if column.codes[r] >= 0 else "?")
        parts.append(f"{_short(self.rows.numbers['temperature_k'].raw(r), 20)}K")
        branch = text["branch"]
        parts.append(branch.values[branch.codes[r]] if branch.codes[r] >= 0 else "adsorption")
        return "|".join(parts) + f" (from row {self.rows.row_label[r]})"


def _issue(label: str, isotherm: str, row, fld, code: str, detail: str) -> Issue:
    isotherm, fld = _printable(isotherm), None if fld is None else _printable(fld)
    where = [f"batch {label!r}", f"isotherm {isotherm!r}"]
    if row is not None:
        where.append(f"row {row}")
    if fld is not None:
        where.append(f"field {fld!r}")
    return Issue(label, isotherm, None if row is None else int(row), fld, code,
                 _printable(f"{', '.join(where)}: {detail}"))


def _issues(found: _Findings, names: _GroupNames, label: str) -> list[Issue]:
    """All findings as Issues, at most MAX_ISSUES_PER_ISOTHERM per isotherm."""
    per_group: dict[int, list[Issue]] = {}
    total = np.zeros(found.n_groups, dtype=np.int64)

    def add(g: int, row, fld, code, detail_fn) -> None:
        total[g] += 1
        bucket = per_group.setdefault(g, [])
        if len(bucket) < MAX_ISSUES_PER_ISOTHERM:
            bucket.append(_issue(label, names[g], row, found.rows.field_name(fld, g), code,
                                 detail_fn()))

    for g, fld, code, detail in found.rows.group_issues:
        add(g, None, fld, code, lambda d=detail: d)
    for g, fld, code, detail in found.group_checks:
        add(g, None, fld, code, lambda d=detail: d)
    for index, fld, code, detail, once in found.row_checks:
        per_isotherm = fld in found.rows.isotherm_level
        # keep only rows that still fit under the cap, without a loop over all of them
        g_rows = found.gid[index]
        counts_before = total.copy()
        order = np.argsort(g_rows, kind="stable")
        rank = np.empty(index.size, dtype=np.int64)
        starts = np.searchsorted(g_rows[order], g_rows[order])
        rank[order] = np.arange(index.size) - starts
        keep = counts_before[g_rows] + rank < MAX_ISSUES_PER_ISOTHERM
        np.add.at(total, g_rows, 1)
        for i in index[keep]:
            g = int(found.gid[i])
            row = None if per_isotherm else found.rows.row_label[i]
            per_group.setdefault(g, []).append(
                _issue(label, names[g], row, found.rows.field_name(fld, g), code, detail(int(i))))
    out: list[Issue] = []
    for g in sorted(per_group):
        bucket = sorted(per_group[g], key=lambda s: (s.row is not None, s.row or 0))
        out.extend(bucket)
        if total[g] > len(bucket):
            out.append(_issue(label, names[g], None, None, "more_issues",
                              f"{total[g] - len(bucket)} more issue(s) not listed"))
    return out


@dataclass
class _Points:
    """All points sorted by (isotherm, pressure); replicates kept, in input order."""

    group: np.ndarray          # isotherm index per point
    pressure_pa: np.ndarray
    loading_mol_per_kg: np.ndarray
    sigma_mol_per_kg: np.ndarray
    start: np.ndarray          # isotherm g owns points start[g]:start[g + 1]
    n_distinct: np.ndarray     # distinct pressures per isotherm
    block_start: np.ndarray    # per point: index of the first point at its pressure


def _sorted_points(gid, n_groups, pressure_pa, loading, sigma) -> _Points:
    """Return every point sorted per isotherm by pressure, replicates kept (module
    docstring)."""
    order = np.lexsort((pressure_pa, gid))
    g, p = gid[order], pressure_pa[order]
    new_pressure = np.ones(g.size, dtype=bool)
    new_pressure[1:] = (g[1:] != g[:-1]) | (p[1:] != p[:-1])
    block_start = np.maximum.accumulate(np.where(new_pressure, np.arange(g.size), 0)) \
        if g.size else np.zeros(0, dtype=np.int64)
    n_distinct = np.bincount(g[new_pressure], minlength=n_groups)
    counts = np.bincount(g, minlength=n_groups)
    return _Points(g, p, loading[order], sigma[order], np.concatenate([[0], np.cumsum(counts)]),
                   n_distinct, block_start)


def _non_monotonic_groups(points: _Points, n_groups: int) -> np.ndarray:
    """Per isotherm: does a point fall below the best loading at lower pressure by more
    than max(2 % of the isotherm's top loading, 3 sigma)?"""
    q = points.loading_mol_per_kg
    top = np.zeros(n_groups)
    np.maximum.at(top, points.group, np.where(np.isfinite(q), q, 0.0))
    scale = np.where(top > 0, top, 1.0)[points.group]
    with np.errstate(all="ignore"):
        q_norm = np.clip(np.nan_to_num(q / scale), 0.0, 1.0)
        allowance = np.maximum(NON_MONOTONIC_FRACTION,
                               NON_MONOTONIC_SIGMAS * np.nan_to_num(points.sigma_mol_per_kg / scale))
    # one running maximum over all isotherms at once: isotherm g is lifted by 2g, so an
    # earlier isotherm's maximum (at most 2g - 1) never reaches into the next one
    lift = 2.0 * points.group
    best_so_far = np.maximum.accumulate(q_norm + lift) - lift
    # compared with the points at strictly lower pressure: replicates are not a fall
    before = points.block_start - 1
    has_lower = (before >= 0) & (points.group[np.maximum(before, 0)] == points.group)
    falls = has_lower & (best_so_far[np.maximum(before, 0)] - q_norm > allowance)
    return np.bincount(points.group[falls], minlength=n_groups) > 0


@dataclass
class _Accepted:
    """Everything needed to build the accepted isotherms, one cheap call each."""

    rows: _Rows
    text: dict
    number: dict
    label: str
    points: _Points
    input_order: np.ndarray    # rows grouped by isotherm, input order inside
    input_start: np.ndarray
    has_sigma: np.ndarray
    adsorbate: list
    group_value: dict
    p0_pa: np.ndarray
    relative_input: np.ndarray
    non_monotonic: np.ndarray

    def isotherm(self, g: int) -> Isotherm:
        pts = self.points
        span = slice(pts.start[g], pts.start[g + 1])
        p = pts.pressure_pa[span].copy()
        q = pts.loading_mol_per_kg[span].copy()
        sigma = pts.sigma_mol_per_kg[span].copy() if self.has_sigma[g] else None
        p0 = None if np.isnan(self.p0_pa[g]) else float(self.p0_pa[g])
        flags = [name for name, on in (
            ("non_monotonic_loading", self.non_monotonic[g]),
            ("pressure_above_saturation",
             p0 is not None and not self.relative_input[g] and p[-1] > p0)) if on]
        value = self.group_value
        sorbent_id = self.text["sorbent_id"].values[int(value["sorbent_id"][g])]
        adsorbate = self.adsorbate[g]
        temperature_k = float(value["temperature_k"][g])
        branch = BRANCHES[int(value["branch"][g])]
        in_input = self.input_order[self.input_start[g]:self.input_start[g + 1]]
        given_id = self.text["isotherm_id"].codes[in_input[0]]
        if given_id >= 0:
            isotherm_id = self.text["isotherm_id"].values[given_id]
        else:
            content = f"{sorbent_id}|{adsorbate.id}|{temperature_k!r}|{branch}".encode()
            digest = hashlib.sha256(content + p.tobytes() + q.tobytes()).hexdigest()[:10]
            isotherm_id = f"{sorbent_id}|{adsorbate.id}|{temperature_k:.2f}K|{branch}|{digest}"
        area = value["surface_area_m2_per_g"][g]
        return Isotherm(
            isotherm_id=isotherm_id, sorbent_id=sorbent_id, adsorbate=adsorbate.id,
            temperature_k=temperature_k, pressure_pa=p, loading_mol_per_kg=q, branch=branch,
            saturation_pressure_pa=p0, sigma_mol_per_kg=sigma,
            surface_area_m2_per_g=None if np.isnan(area) else float(area),
            batch_label=self.label, flags=flags, original=self._original(g, in_input),
        )

    def _original(self, g: int, in_input: np.ndarray) -> dict[str, Any]:
        """The values as sent, with their units and source rows, in input order."""
        first = in_input[0]

        def as_sent(name):
            column = self.text[name]
            code = column.codes[first]
            return column.values[code] if code >= 0 else None

        def scalar(name):
            column = self.number[name]
            return float(column.value[first]) if column.problem[first] == _OK else None

        number = self.number
        given = {"pressure": True, "loading": True, "loading_sigma": bool(self.has_sigma[g]),
                 "saturation_pressure": number["saturation_pressure"].problem[first] == _OK}
        sent_units = {q: as_sent(UNIT_FIELD[q]) for q in QUANTITIES if given[q]}
        # plain saturation_pressure / loading_sigma columns take the pressure / loading unit
        for quantity, kind in (("saturation_pressure", "pressure"), ("loading_sigma", "loading")):
            if quantity in sent_units and sent_units[quantity] is None:
                sent_units[quantity] = sent_units[kind]
        return {
            "source": self.rows.source,
            "rows": self.rows.row_label[in_input],
            "adsorbate": as_sent("adsorbate"),
            "temperature_k": scalar("temperature_k"),
            "pressure": number["pressure"].value[in_input],
            "loading": number["loading"].value[in_input],
            "loading_sigma": number["loading_sigma"].value[in_input] if self.has_sigma[g] else None,
            "units": {q: u for q, u in sent_units.items() if u is not None},
            "saturation_pressure": scalar("saturation_pressure"),
            "sample_mass_g": scalar("sample_mass_g"),
        }


# ---------------------------------------------------------------------------
# conditions and mixtures (JSON only)

CONDITION_PRESSURES = ("adsorption_pressure", "desorption_pressure", "reference_pressures")
# each reference pressure becomes columns of every later ranking row (the shared summaries)
MAX_REFERENCE_PRESSURES = 32
CONDITION_TEMPERATURES = ("adsorption_temperature_k", "desorption_temperature_k")


def _pressure_keys(raw: dict, bases: tuple, others: tuple, settings: dict, where: str, label: str,
                   code: str) -> dict[str, tuple[Any, float]]:
    """{base: (value, Pa per unit)} for keys ``base`` (in the declared pressure unit) or
    ``base_<token>``; any other key outside ``others`` is an error."""
    if not isinstance(raw, dict):
        raise _batch_error(label, code, "must be an object", fld=where)
    out: dict[str, tuple[Any, float]] = {}
    for key, value in raw.items():
        name = str(key).strip().lower()
        if name in others:
            continue
        if name == "pressure_unit":
            raise _batch_error(label, "old_spelling", f"{where}: 'pressure_unit' is no longer read: "
                               f"name the unit in each key (e.g. {bases[0]}_kpa) or declare the "
                               "top-level units", fld=f"{where}.pressure_unit")
        base = next((b for b in bases if name == b or name.startswith(b + "_")), None)
        if base is None:
            near = _nearest(name, [f"{b}_kpa" for b in bases] + list(others))
            raise _batch_error(label, code, f"unknown key {_short(key)!r}"
                               + (f"; did you mean {near!r}?" if near else ""), fld=where)
        if base in out:
            raise _batch_error(label, code, f"two keys give {base}; keep one", fld=f"{where}.{key}")
        if name == base:
            unit = settings.get("units", {}).get("pressure")
            if unit is None:
                raise _batch_error(label, code, f"{base!r} has no unit: name it in the key "
                                   f"(e.g. {base}_kpa) or declare the top-level units",
                                   fld=f"{where}.{key}")
        else:
            token = name[len(base) + 1:]
            unit = units.COLUMN_TOKENS["pressure"].get(token)
            if unit is None:
                raise _batch_error(label, code, f"{token!r} is not a pressure unit token (tokens: "
                                   f"{', '.join(units.COLUMN_TOKENS['pressure'])})",
                                   fld=f"{where}.{key}")
        factor = units.PRESSURE_PA_PER_UNIT[unit]
        if factor is None:
            raise _batch_error(label, code, "must be an absolute pressure, not relative",
                               fld=f"{where}.{key}")
        out[base] = (value, factor)
    return out


def _conditions(raw: Any, settings: dict, label: str) -> Conditions:
    if raw is None:
        return Conditions()
    where = "conditions"
    pressures = _pressure_keys(raw, CONDITION_PRESSURES, CONDITION_TEMPERATURES, settings, where,
                               label, "invalid_conditions")
    out = {}
    for key, minimum in (("adsorption_pressure", "positive"), ("desorption_pressure", "non_negative")):
        if key in pressures:
            value, pa_per_unit = pressures[key]
            out[key + "_pa"] = _checked_pressure_pa(value, pa_per_unit, minimum, f"{where}.{key}",
                                                    label, "invalid_conditions")
    if "reference_pressures" in pressures:
        values, pa_per_unit = pressures["reference_pressures"]
        if not isinstance(values, list) or not values:
            raise _batch_error(label, "invalid_conditions", "must be a non-empty list of numbers",
                               fld=f"{where}.reference_pressures")
        if len(values) > MAX_REFERENCE_PRESSURES:
            raise _batch_error(label, "invalid_conditions", f"{len(values)} values, at most "
                               f"{MAX_REFERENCE_PRESSURES} (each becomes result columns)",
                               fld=f"{where}.reference_pressures")
        out["reference_pressures_pa"] = tuple(
            _checked_pressure_pa(v, pa_per_unit, "non_negative", f"{where}.reference_pressures[{i}]",
                                 label, "invalid_conditions") for i, v in enumerate(values))
    for key in CONDITION_TEMPERATURES:
        if raw.get(key) is not None:
            out[key] = _checked_temperature_k(raw[key], f"{where}.{key}", label, "invalid_conditions")
    conditions = Conditions(**{**Conditions().__dict__, **out})
    if conditions.desorption_pressure_pa > conditions.adsorption_pressure_pa:
        raise _batch_error(label, "invalid_conditions",
                           "desorption pressure must not be above the adsorption pressure",
                           fld=f"{where}.desorption_pressure")
    return conditions


def _mixtures(raw: Any, settings: dict, declared: list, label: str) -> list[MixtureRequest]:
    if raw is None:
        return []
    if not isinstance(raw, list):
        raise _batch_error(label, "invalid_mixture", "must be a list", fld="mixtures")
    fields = ("sorbent_id", "components", "mole_fractions", "temperature_k")
    out = []
    for i, item in enumerate(raw):
        where = f"mixtures[{i}]"
        pressures = _pressure_keys(item, ("total_pressure",), fields, settings, where, label,
                                   "invalid_mixture")
        sorbent_id = item.get("sorbent_id")
        if sorbent_id is not None:
            problem = _id_problem(sorbent_id) if isinstance(sorbent_id, str) else "is not text"
            if problem:
                raise _batch_error(label, "invalid_mixture", f"sorbent_id {_echo(str(sorbent_id))} "
                                   f"{problem} (give a valid id, or null for every sorbent)",
                                   fld=f"{where}.sorbent_id")
        components = item.get("components")
        fractions = item.get("mole_fractions")
        if not isinstance(components, list) or len(components) < 2:
            raise _batch_error(label, "invalid_mixture", "needs a list of at least 2 components",
                               fld=f"{where}.components")
        ids = []
        for c in components:
            found = _lookup(c, declared) if isinstance(c, str) else None
            if found is None:
                raise _batch_error(label, "invalid_mixture", _unknown_adsorbate(str(c)),
                                   fld=f"{where}.components")
            ids.append(found.id)
        if len(set(ids)) != len(ids):
            raise _batch_error(label, "invalid_mixture", "a component is listed twice",
                               fld=f"{where}.components")
        if not isinstance(fractions, list) or len(fractions) != len(ids):
            raise _batch_error(label, "invalid_mixture", "needs one mole fraction per component",
                               fld=f"{where}.mole_fractions")
        y = [_checked_number(v, "positive", f"{where}.mole_fractions[{k}]", label, "invalid_mixture")
             for k, v in enumerate(fractions)]
        if abs(sum(y) - 1.0) > 1e-6:
            raise _batch_error(label, "invalid_mixture", f"mole fractions sum to {sum(y):.9g}, not 1",
                               fld=f"{where}.mole_fractions")
        if "total_pressure" not in pressures:
            raise _batch_error(label, "invalid_mixture", "needs a total pressure (e.g. "
                               "total_pressure_bar)", fld=f"{where}.total_pressure")
        value, pa_per_unit = pressures["total_pressure"]
        out.append(MixtureRequest(
            sorbent_id=sorbent_id, components=ids, mole_fractions=y,
            total_pressure_pa=_checked_pressure_pa(value, pa_per_unit, "positive",
                                                   f"{where}.total_pressure", label, "invalid_mixture"),
            temperature_k=_checked_temperature_k(item.get("temperature_k"), f"{where}.temperature_k",
                                                 label, "invalid_mixture")))
    return out


def _checked_number(value: Any, minimum: str, fld: str, label: str, code: str) -> float:
    number, problem = _json_number(value)
    if problem != _OK:
        raise _batch_error(label, code, f"{_short(json.dumps(value))} is not a finite number", fld=fld)
    if number < 0 or (minimum == "positive" and number == 0):
        raise _batch_error(label, code, f"{number:g} must be "
                           + ("greater than zero" if minimum == "positive" else "zero or more"), fld=fld)
    return number


def _checked_pressure_pa(value: Any, pa_per_unit: float, minimum: str, fld: str, label: str,
                         code: str) -> float:
    """``value`` (in the unit of ``pa_per_unit``) in Pa, checked against the physical bound."""
    number = _checked_number(value, minimum, fld, label, code)
    pressure_pa = number * pa_per_unit
    if not pressure_pa <= units.MAX_PRESSURE_PA:  # inf after an overflow fails too
        became = "overflows when converted to Pa" if math.isinf(pressure_pa) else \
            f"is {pressure_pa:.3g} Pa"
        raise _batch_error(label, code, f"{number:g} {became}, above the limit "
                           f"{units.MAX_PRESSURE_PA:g} Pa", fld=fld)
    return pressure_pa


def _checked_temperature_k(value: Any, fld: str, label: str, code: str) -> float:
    temperature_k = _checked_number(value, "positive", fld, label, code)
    if temperature_k > units.MAX_TEMPERATURE_K:
        raise _batch_error(label, code, f"{temperature_k:g} K is above the limit "
                           f"{units.MAX_TEMPERATURE_K:g} K", fld=fld)
    return temperature_k
