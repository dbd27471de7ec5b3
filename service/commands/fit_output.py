"""What ``sorbrank fit`` writes: the ranked text table, the JSON document, CSV and
Parquet tables, and the progress bar. Imports nothing heavy at load (``sorbrank fit
--help`` stays fast); pyarrow, numpy and orjson are imported where used."""
from __future__ import annotations

import math
import sys
from pathlib import Path


def json_bytes(doc: dict) -> bytes:
    """The --format json document as UTF-8 bytes, through orjson (about 40 %
    of a 20,000-isotherm run went to the json module; see bench_start.py).

    ``to_json`` already holds None where a number is NaN or infinite; orjson
    would write null for any that slipped through, so the output is always
    valid JSON (the json module's allow_nan=False raised instead)."""
    import orjson

    return orjson.dumps(doc, option=orjson.OPT_INDENT_2 | orjson.OPT_APPEND_NEWLINE)


MISSING = "—"


def render_table(table, sort: str, conditions=None, width: int | None = None) -> str:
    """A ranked plain-text table, one line per isotherm: identity, best model,
    q_sat with its 95 % interval, BET area, working capacity with the pressure
    swing of ``conditions`` (a worker.isotherm.Conditions), points and flags.
    Lines longer than ``width`` characters end in an ellipsis."""
    from sorbrank.worker.store import Q_SAT_MAX_RELATIVE_STDERR, RELIABILITY_OF_SORT

    names = set(table.column_names)
    columns = [c for c in _table_columns(conditions) if c[0] in names]
    shown = {source for c in columns for source in _TABLE_SOURCES[c[0]]}
    if sort not in shown and sort != "isotherm_id":
        shown.add(sort)
        numeric = is_numeric(table.schema.field(sort).type)
        columns.insert(-1, (sort, sort, (lambda row, s=sort: _number(row[s], ".4g")) if numeric
                            else (lambda row, s=sort: _text(row[s])), numeric))
    # a figure the ranking holds unreliable (an extrapolation, or q_sat with a
    # large standard error) is starred, so the table never shows it as fact
    judged = {c[0]: RELIABILITY_OF_SORT[c[0]] for c in columns
              if RELIABILITY_OF_SORT.get(c[0]) in names}
    data = {name: table[name].to_pylist() for name in shown | set(judged.values()) if name in names}
    headers = ["#"] + [header for _, header, _, _ in columns]
    right = [True] + [r for _, _, _, r in columns]
    rows, starred = [], False
    for i in range(table.num_rows):
        row = {name: values[i] for name, values in data.items()}
        cells = [str(i + 1)]
        for name, _, render, _ in columns:
            cell = render(row)
            if name in judged and row[judged[name]] is False and cell != MISSING:
                cell, starred = cell + " *", True
            cells.append(cell)
        rows.append(cells)
    widths = [max(len(r[j]) for r in rows + [headers]) for j in range(len(headers))]

    def line(cells):
        text = "  ".join(c.rjust(w) if r else c.ljust(w)
                         for c, w, r in zip(cells, widths, right)).rstrip()
        return text if width is None or len(text) <= width else text[: width - 1] + "…"

    # the last column is ragged (flags): its rule spans the header only
    rule = ["-" * w for w in widths[:-1]] + ["-" * len(headers[-1])]
    notes = [f"* unreliable: an extrapolation beyond the measured data (q_sat: also a standard "
             f"error above {Q_SAT_MAX_RELATIVE_STDERR:.0%}); see docs/results.md, 'Default "
             "ranking'"] if starred else []
    return "\n".join([line(headers), line(rule)] + [line(r) for r in rows] + notes) + "\n"


# summary columns each table column is drawn from (the first names it)
_TABLE_SOURCES = {
    "sorbent_id": ("sorbent_id",),
    "adsorbate": ("adsorbate",),
    "temperature_k": ("temperature_k",),
    "best_model": ("best_model",),
    "q_sat_mol_per_kg": ("q_sat_mol_per_kg", "q_sat_ci95_low_mol_per_kg",
                         "q_sat_ci95_high_mol_per_kg"),
    "bet_area_m2_per_g": ("bet_area_m2_per_g",),
    "working_capacity_mol_per_kg": ("working_capacity_mol_per_kg",),
    "n_points": ("n_points",),
    "quality_flags": ("quality_flags",),
}


def _table_columns(conditions):
    """(summary column, header, row -> cell text, right-aligned) in display order."""
    swing = "" if conditions is None else \
        f" ({pressure_swing(conditions.adsorption_pressure_pa, conditions.desorption_pressure_pa)})"
    return [
        ("sorbent_id", "sorbent", lambda r: _text(r["sorbent_id"]), False),
        ("adsorbate", "gas", lambda r: _text(r["adsorbate"]), False),
        ("temperature_k", "T/K", lambda r: _number(r["temperature_k"], ".2f"), True),
        ("best_model", "best model", lambda r: _text(r["best_model"]), False),
        ("q_sat_mol_per_kg", "q_sat mol/kg [95 %]", _q_sat_cell, True),
        ("bet_area_m2_per_g", "BET m2/g", lambda r: _area(r.get("bet_area_m2_per_g")), True),
        ("working_capacity_mol_per_kg", "work. cap. mol/kg",
         lambda r: _with_suffix(_number(r["working_capacity_mol_per_kg"], ".3g"), swing), True),
        ("n_points", "n", lambda r: _number(r["n_points"], "d"), True),
        ("quality_flags", "flags", lambda r: ",".join(r["quality_flags"] or []), False),
    ]


def pressure_swing(adsorption_pa: float, desorption_pa: float) -> str:
    """'1→0.1 bar': adsorption -> desorption pressure, in bar, kPa or Pa
    (the largest unit in which the lower pressure is at least 0.01)."""
    low = min(adsorption_pa, desorption_pa)
    for unit, pa in (("bar", 1e5), ("kPa", 1e3), ("Pa", 1.0)):
        if low >= 0.01 * pa or unit == "Pa":
            return f"{adsorption_pa / pa:g}→{desorption_pa / pa:g} {unit}"
    raise AssertionError("unreachable")


def _q_sat_cell(row) -> str:
    """'4.21 [3.98, 4.45]': three significant digits of q_sat, its interval to
    the same decimal place; '4.21 [—]' where the fit gives no interval."""
    q = row["q_sat_mol_per_kg"]
    if not _finite(q):
        return _number(q, ".3g")
    places = max(0, 2 - math.floor(math.log10(abs(q)))) if q else 2
    low, high = row.get("q_sat_ci95_low_mol_per_kg"), row.get("q_sat_ci95_high_mol_per_kg")
    if _finite(low) and _finite(high):
        return f"{q:.{places}f} [{low:.{places}f}, {high:.{places}f}]"
    return f"{q:.{places}f} [{MISSING}]"


def _area(value) -> str:
    # areas run from ~1 to ~7000 m2/g: whole numbers above 100 read best
    return _number(value, ".0f" if _finite(value) and abs(value) >= 100 else ".3g")


def _with_suffix(cell: str, suffix: str) -> str:
    return cell if cell == MISSING else cell + suffix


def _finite(value) -> bool:
    return isinstance(value, (int, float)) and math.isfinite(value)


def _number(value, fmt: str) -> str:
    if value is None or (isinstance(value, float) and value != value):
        return MISSING
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    return format(value, fmt)


def _text(value) -> str:
    return MISSING if value is None else str(value)


def terminal_width() -> int | None:
    """Columns of the terminal standard output is, None when it is not one."""
    import shutil

    return shutil.get_terminal_size().columns if sys.stdout.isatty() else None


def fits_rows(fits_table, index, n_models: int):
    import numpy as np

    rows = (np.asarray(index)[:, None] * n_models + np.arange(n_models)[None, :]).ravel()
    return fits_table.take(rows)


def write_table(table, fmt: str, out: str | None) -> None:
    """``table`` as Parquet (to ``out``) or CSV (to ``out`` or standard output), the CSV
    in the one export encoding (``sorbrank.worker.csvcodec``; docs/formats.md,
    "Exports"), the same as the API's."""
    import pyarrow.parquet as pq

    from sorbrank.worker import csvcodec

    if fmt == "parquet":
        pq.write_table(table, out)
        return
    if out:
        with open(out, "w", encoding="utf-8", newline="") as fh:
            csvcodec.write_csv(table, fh)
    else:
        csvcodec.write_csv(table, sys.stdout)


def emit_text(text: str, out: str | None) -> None:
    if out:
        Path(out).write_text(text)
    else:
        sys.stdout.write(text)


def emit_bytes(data: bytes, out: str | None) -> None:
    if out:
        Path(out).write_bytes(data)
        return
    buffer = getattr(sys.stdout, "buffer", None)
    if buffer is None:  # a text-only stream, e.g. contextlib.redirect_stdout(io.StringIO())
        sys.stdout.write(data.decode())
        return
    sys.stdout.flush()
    buffer.write(data)
    buffer.flush()


def is_nested(arrow_type) -> bool:
    import pyarrow as pa

    return pa.types.is_nested(arrow_type)


def is_numeric(arrow_type) -> bool:
    import pyarrow as pa

    return pa.types.is_integer(arrow_type) or pa.types.is_floating(arrow_type)


class ProgressBar:
    """'fitting [#####-----]  50%  1000/2000 isotherms' on one stderr line."""

    WIDTH = 30

    def __init__(self, stream):
        self.stream = stream

    def __call__(self, done: int, total: int) -> None:
        share = done / total if total else 1.0
        filled = int(round(self.WIDTH * share))
        self.stream.write(f"\rfitting [{'#' * filled}{'-' * (self.WIDTH - filled)}] "
                          f"{share:4.0%}  {done}/{total} isotherms")
        self.stream.flush()

    def finish(self) -> None:
        self.stream.write("\n")
        self.stream.flush()
