"""``sorbrank.fit`` and its ``Results``: the engine for notebooks and scripts.

``fit`` reads the data through the same intake as every other route
(``sorbrank.worker.intake.read_batch``) and fits it with the one engine
(``sorbrank.worker.pipeline.process_batch``), so a DataFrame fitted here gives
the numbers ``sorbrank fit`` and the service give for the same isotherms.

pandas and matplotlib are optional here: pandas is imported only when a
DataFrame is passed in or asked for, matplotlib only by ``Results.plot``.
"""
from __future__ import annotations

import html
import math
import os
import sys
from pathlib import Path
from typing import Any

PLOT_KINDS = ("isotherm", "langmuir-linear", "bet")
TABLES = ("summary", "fits", "sorbents")
# the columns a notebook shows first: who, what, which model, the headline figures
HTML_COLUMNS = ("sorbent_id", "adsorbate", "temperature_k", "best_model", "q_sat_mol_per_kg",
                "henry_mol_per_kg_pa", "working_capacity_mol_per_kg", "quality_flags")
HTML_ROWS = 10
HTML_ISSUES = 3
# temperatures of one isotherm as typed by people: 298 and 298.15 name the same one
TEMPERATURE_MATCH_K = 0.5


def fit(data, *, units=None, models="all", criterion: str = "aicc", weighting: str = "uniform",
        absolute_sigma: bool = False,
        conditions: dict | None = None, mixtures: list | None = None,
        sample_mass_g: float | None = None, gases: list | None = None,
        batch_label: str | None = None, workers: int = 1) -> Results:
    """Fit every isotherm in ``data``; return its ``Results``.

    ``data``: a pandas DataFrame, a pyarrow Table, a path (str or
    pathlib.Path) to a CSV, JSON or Parquet batch file, a list of such paths
    (or of any of these), or the bytes of a batch file. Columns as in the
    batch formats: ``sorbent_id, adsorbate, temperature_k`` and a pressure and
    a loading column whose name carries the unit (``pressure_kpa``,
    ``loading_mmol_per_g``, ...), or plain ``pressure``/``loading`` with
    ``units={"pressure": "kPa", "loading": "mmol/g"}`` (or the text form
    ``"pressure:kPa,loading:mmol/g"``).

    ``models`` ("all", "a,b" or a list of model ids), ``criterion`` ("aicc",
    "aic", "bic") and ``weighting`` ("uniform", "relative", "sigma") are the
    options of ``sorbrank fit``; ``absolute_sigma=True`` (with weighting
    "sigma") takes the sigma as calibrated (``--absolute-sigma``).
    ``conditions`` and ``mixtures`` take the objects of the JSON batch format
    and replace those of the input.
    ``gases`` declares gases the property table does not know (dicts with
    ``name``, ``molar_mass_g_per_mol`` and optionally
    ``critical_temperature_k``). ``workers`` > 1 fits chunks of 2,000
    isotherms (DEFAULT_CHUNK_SIZE) in that many processes (same results).

    Raises ValueError for a bad keyword value or an input that cannot be read
    as a whole (``sorbrank.worker.isotherm.IntakeError``); problems of single
    isotherms never raise, they are listed in ``Results.rejected``.
    """
    from sorbrank.worker.pipeline import FitOptions, process_batch

    options = FitOptions(models=models, criterion=criterion, weighting=weighting,
                         absolute_sigma=absolute_sigma)
    if not isinstance(workers, int) or isinstance(workers, bool) or workers < 1:
        raise ValueError(f"workers must be a whole number of at least 1; got {workers!r}")
    batch = read_data(data, units=units, sample_mass_g=sample_mass_g, gases=gases,
                      batch_label=batch_label)
    if conditions is not None or mixtures is not None:
        _apply_conditions(batch, conditions, mixtures,
                          {"units": units, "sample_mass_g": sample_mass_g, "gases": gases})
    return Results(process_batch(batch, options, workers=workers))


def read_data(data, *, units=None, sample_mass_g=None, gases=None, batch_label=None):
    """The ``Batch`` intake reads from ``data`` (any input ``fit`` takes).

    Several inputs become one batch: isotherms and rejections of all, the
    conditions of the first, the mixtures of all, labels joined with "+"
    (as ``sorbrank fit`` does with several files).
    """
    from sorbrank.worker.isotherm import Batch

    if isinstance(data, (list, tuple)):
        if not data:
            raise ValueError("data is an empty list: give at least one input")
        batches = [_read_one(item, units, sample_mass_g, gases,
                             None if batch_label is None else f"{batch_label}-{i + 1}")
                   for i, item in enumerate(data)]
        return batches[0] if len(batches) == 1 else Batch.combined(batches, batch_label)
    return _read_one(data, units, sample_mass_g, gases, batch_label)


def _read_one(data, units, sample_mass_g, gases, batch_label):
    import pyarrow as pa

    from sorbrank.worker.intake import Limits, read_batch

    if is_dataframe(data):
        source = dataframe_to_table(data)
    elif isinstance(data, pa.Table):
        source = data
    elif isinstance(data, (bytes, bytearray, memoryview)):
        source = bytes(data)
    elif isinstance(data, (str, os.PathLike)):
        source = _existing_path(data)
    else:
        raise TypeError("data must be a pandas DataFrame, a pyarrow Table, a path, a list of "
                        f"paths or bytes; got {type(data).__name__}")
    # intake checks units, sample mass and gases (IntakeError, a ValueError naming them)
    return read_batch(source, batch_label=batch_label, units=units, sample_mass_g=sample_mass_g,
                      gases=gases, limits=Limits.for_local_files())


def _existing_path(value) -> Path:
    path = Path(value)
    if path.is_file():
        return path
    if isinstance(value, str) and ("\n" in value or "," in value and not path.suffix):
        raise ValueError("a str is read as a file path, and this one names no file; "
                         "pass the contents of a batch as bytes (text.encode())")
    raise FileNotFoundError(f"no such file: {value}")


def is_dataframe(value) -> bool:
    """Whether ``value`` is a pandas DataFrame (pandas is not imported to find out)."""
    # pandas cannot have made a DataFrame unless it is imported: no import here
    pd = sys.modules.get("pandas")
    return pd is not None and isinstance(value, pd.DataFrame)


def dataframe_to_table(df):
    """A pandas DataFrame as a pyarrow Table for intake (the index left out).

    A column pyarrow cannot type as a whole (text in a column of numbers, a
    typo from a spreadsheet) goes in as text, so intake names the bad row and
    field instead of the conversion failing on the whole frame.
    """
    import pyarrow as pa

    try:
        return pa.Table.from_pandas(df, preserve_index=False)
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        pass
    columns = {}
    for name in df.columns:
        series = df[name]
        try:
            columns[str(name)] = pa.array(series, from_pandas=True)
        except (pa.ArrowInvalid, pa.ArrowTypeError):
            columns[str(name)] = pa.array(
                [None if _missing(v) else str(v) for v in series.tolist()], pa.string())
    return pa.table(columns)


def _missing(value) -> bool:
    return value is None or (isinstance(value, float) and math.isnan(value))


def _apply_conditions(batch, conditions, mixtures, settings: dict) -> None:
    """Conditions and mixtures given as keywords, read by intake's rules for the
    JSON batch format, with the units and gases declared beside them."""
    from sorbrank.worker.intake import checked_settings, declared_gases, read_conditions, read_mixtures

    # intake's own settings check and gas declarations, exactly as read_batch runs them
    checked = checked_settings(settings, "argument", batch.label)
    declared = declared_gases(checked.get("gases", []), batch.label)
    if conditions is not None:
        batch.conditions = read_conditions(conditions, checked, batch.label)
    if mixtures is not None:
        batch.mixtures = read_mixtures(mixtures, checked, declared, batch.label)


def pandas_module():
    """pandas, or an ImportError that says how to get it."""
    try:
        import pandas
    except ImportError:
        raise ImportError("this needs pandas, an optional extra of sorbrank: "
                          "pip install 'sorbrank[pandas]' (or ask for pyarrow Tables: "
                          ".to_arrow())") from None
    return pandas


class Results:
    """What ``sorbrank.fit`` found: tables as pandas or pyarrow, issues, plots.

    ``summary``: one row per accepted isotherm (identity, selected model,
    q_sat_mol_per_kg, henry_mol_per_kg_pa, loadings, working capacity, BET
    area, flags...). ``fits``: one row per isotherm and model (parameters,
    standard errors, 95 % intervals, criteria). ``sorbents``: the per-sorbent
    figures (isosteric heat, IAST, temperature swing). Each is a new pandas
    DataFrame on every access; ``to_arrow(table)`` gives the pyarrow Table.
    All numbers are in canonical units (Pa, K, mol/kg, J/mol, m2/g).
    """

    def __init__(self, result):
        self._result = result  # sorbrank.worker.pipeline.BatchResult
        self._tables: dict[str, Any] = {}
        self._records: list[dict] | None = None

    # -- tables ---------------------------------------------------------------
    def to_arrow(self, table: str = "summary"):
        """The ``summary``, ``fits`` or ``sorbents`` table as a pyarrow Table."""
        if table not in TABLES:
            raise ValueError(f"table must be one of {', '.join(TABLES)}; got {table!r}")
        if table not in self._tables:
            if table == "summary":
                self._tables[table] = self._result.summary_table()
            elif table == "fits":
                self._tables[table] = self._result.fits_table()
            else:
                import pyarrow as pa

                from sorbrank.worker.jobs import sorbent_rows_table

                rows = self._result.sorbent_rows
                self._tables[table] = sorbent_rows_table(rows) if rows else pa.table({})
        return self._tables[table]

    def to_pandas(self, table: str = "summary"):
        """The ``summary``, ``fits`` or ``sorbents`` table as a new pandas DataFrame."""
        arrow = self.to_arrow(table)
        pandas_module()
        return arrow.to_pandas()

    @property
    def summary(self):
        return self.to_pandas("summary")

    @property
    def fits(self):
        return self.to_pandas("fits")

    @property
    def sorbents(self):
        return self.to_pandas("sorbents")

    @property
    def rejected(self) -> list[dict]:
        """Intake issues: dicts of batch, isotherm, row, field, code, message."""
        return [issue.as_dict() for issue in self._result.batch.rejected]

    @property
    def batch_label(self) -> str:
        return self._result.batch.label

    @property
    def n_isotherms(self) -> int:
        return self._result.n

    @property
    def n_selected(self) -> int:
        """Isotherms for which some model was selected."""
        return sum(1 for best in self._result.selection.best if best is not None)

    def records(self) -> list[dict]:
        """One dict per isotherm, exactly as ``sorbrank fit --format json`` lists them."""
        if self._records is None:
            self._records = self._result.isotherm_records()
        return self._records

    # -- plots ----------------------------------------------------------------
    def plot(self, sorbent_id: str | None = None, adsorbate: str | None = None,
             temperature_k: float | None = None, *, isotherm_id: str | None = None,
             branch: str | None = None, kind: str = "isotherm", log_pressure: bool = False):
        """A matplotlib Figure of one isotherm: its points and fits (``kind``
        "isotherm", residuals below), the double-reciprocal Langmuir view
        ("langmuir-linear") or the BET transform ("bet").

        The isotherm is chosen by any of sorbent, adsorbate, temperature
        (within 0.5 K), branch or isotherm id; they must leave exactly one.
        """
        if kind not in PLOT_KINDS:
            raise ValueError(f"kind must be one of {', '.join(PLOT_KINDS)}; got {kind!r}")
        index = self._one_isotherm(sorbent_id, adsorbate, temperature_k, isotherm_id, branch)
        iso = self._result.batch.isotherms[index]
        record = self.records()[index]
        from sorbrank.service import plots

        if kind == "isotherm":
            return plots.isotherm_figure(iso.pressure_pa, iso.loading_mol_per_kg, record,
                                         log_pressure=log_pressure,
                                         saturation_pressure_pa=iso.saturation_pressure_pa,
                                         temperature_k=iso.temperature_k)
        if kind == "langmuir-linear":
            return plots.langmuir_linear_figure(iso.pressure_pa, iso.loading_mol_per_kg, record)
        if iso.relative_pressure is None:
            raise ValueError(f"isotherm {iso.isotherm_id!r} has no saturation pressure: "
                             "a BET plot needs p/p0")
        return plots.bet_figure(iso.relative_pressure, iso.loading_mol_per_kg,
                                record.get("summary") or {})

    def _one_isotherm(self, sorbent_id, adsorbate, temperature_k, isotherm_id, branch) -> int:
        isotherms = self._result.batch.isotherms
        if not isotherms:
            raise ValueError("no isotherm was accepted, so there is nothing to plot")

        def wanted(iso) -> bool:
            return ((sorbent_id is None or iso.sorbent_id == sorbent_id)
                    and (adsorbate is None or iso.adsorbate.lower() == str(adsorbate).lower())
                    and (temperature_k is None
                         or abs(iso.temperature_k - float(temperature_k)) <= TEMPERATURE_MATCH_K)
                    and (isotherm_id is None or iso.isotherm_id == isotherm_id)
                    and (branch is None or iso.branch == branch))

        found = [i for i, iso in enumerate(isotherms) if wanted(iso)]
        if len(found) == 1:
            return found[0]
        asked = ", ".join(f"{k}={v!r}" for k, v in (
            ("sorbent_id", sorbent_id), ("adsorbate", adsorbate), ("temperature_k", temperature_k),
            ("isotherm_id", isotherm_id), ("branch", branch)) if v is not None) or "no selection"
        shown = [_isotherm_name(isotherms[i]) for i in (found or range(len(isotherms)))[:10]]
        more = len(found or isotherms) - len(shown)
        listing = "; ".join(shown) + (f"; ... ({more} more)" if more > 0 else "")
        if not found:
            raise ValueError(f"no accepted isotherm matches {asked}; isotherms: {listing}")
        raise ValueError(f"{len(found)} isotherms match {asked}; narrow it down "
                         f"(sorbent_id, adsorbate, temperature_k, branch or isotherm_id): {listing}")

    # -- display --------------------------------------------------------------
    def __repr__(self) -> str:
        return (f"<sorbrank.Results batch {self.batch_label!r}: {self.n_isotherms} isotherms, "
                f"{self.n_selected} with a selected model, {len(self._result.batch.rejected)} "
                f"rejection issue(s)>")

    def _repr_html_(self) -> str:
        summary = self.to_arrow("summary")
        columns = [c for c in HTML_COLUMNS if c in summary.column_names]
        head = summary.select(columns).slice(0, HTML_ROWS).to_pylist()
        esc = html.escape
        from sorbrank.service.client import format_cell

        lines = ['<div class="sorbrank-results">',
                 (f"<p><b>sorbrank results</b>, batch {esc(self.batch_label)}: "
                  f"{self.n_isotherms} isotherm(s), {self.n_selected} with a selected model, "
                  f"{len(self._result.batch.rejected)} rejection issue(s); criterion "
                  f"{esc(self._result.options.criterion)}</p>"),
                 "<table><thead><tr>" + "".join(f"<th>{esc(c)}</th>" for c in columns)
                 + "</tr></thead><tbody>"]
        for row in head:
            cells = "".join(f"<td>{esc(format_cell(row[c]))}</td>" for c in columns)
            lines.append(f"<tr>{cells}</tr>")
        lines.append("</tbody></table>")
        if summary.num_rows > HTML_ROWS:
            lines.append(f"<p>... {summary.num_rows - HTML_ROWS} more row(s); "
                         f".summary holds all {summary.num_columns} columns</p>")
        rejected = self._result.batch.rejected
        if rejected:
            shown = "".join(f"<li>{esc(issue.message)}</li>" for issue in rejected[:HTML_ISSUES])
            lines.append(f"<p>Rejected (first {min(len(rejected), HTML_ISSUES)} of "
                         f"{len(rejected)}; all in .rejected):</p><ul>{shown}</ul>")
        lines.append("</div>")
        return "\n".join(lines)


def _isotherm_name(iso) -> str:
    return (f"{iso.sorbent_id} {iso.adsorbate} {iso.temperature_k:g} K {iso.branch} "
            f"(isotherm_id {iso.isotherm_id!r})")



__all__ = ["Results", "dataframe_to_table", "fit", "is_dataframe", "read_data"]
