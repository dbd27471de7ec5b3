"""``sorbrank fit``: fit, select and rank the isotherms of local files."""
from __future__ import annotations

import argparse
import json
import math
import os
import sys
from pathlib import Path

FORMATS = ("table", "json", "csv", "parquet")
CRITERIA = ("aicc", "bic", "aic")
WEIGHTINGS = ("uniform", "relative", "sigma")
DEFAULT_SORT = "q_sat_mol_per_kg"
# the CLI reads local files: allow far more than the HTTP service accepts

DESCRIPTION = """\
Fit every published isotherm model to each isotherm of the input files, pick
the model the data support, and print the isotherms ranked.

For each isotherm sorbrank fits the model catalogue by weighted least squares
(all isotherms at once, on all cores), drops models that failed, do not apply
(p/p0 models need a saturation pressure) or hit a parameter bound, and picks
the model with the lowest information criterion. When another model is within
2 units the choice is flagged ambiguous and the model with fewer parameters
wins. Screening figures (saturation capacity, Henry constant, loadings,
working capacity, BET area, ...) come from the selected model.

Input: CSV, JSON or Parquet files as described in the README (one row per
point: sorbent_id, adsorbate, temperature_k, pressure, loading, with units
given per row or per file). Isotherms that fail validation are listed on
standard error with the reason and left out; the rest are fitted.

Every number printed or written is in canonical units: pressure Pa,
temperature K, loading mol/kg, energy J/mol, area m2/g."""

EPILOG = """\
options in detail:
  --models      'all' (default) or a comma list of model ids, e.g.
                langmuir,sips,dual_site_langmuir; 'sorbrank models' lists them.
  --criterion   aicc (default; AIC with the small-sample correction, best for
                the 10-50 points of a typical isotherm), aic, or bic (penalises
                extra parameters more as the point count grows).
  --weighting   uniform (default): ordinary least squares, every point counts
                the same, errors in mol/kg. relative: errors proportional to
                loading, so low-pressure points weigh as much as the plateau.
                sigma: the per-point 'sigma' column of the input (mol/kg after
                unit conversion); isotherms without it use uniform weights.
  --sort        a column of the summary table (see --format csv), e.g.
                q_sat_mol_per_kg (default), henry_mol_per_kg_pa,
                working_capacity_mol_per_kg, sorbent_id. Numbers sort
                largest first, text A-Z; --ascending reverses numbers.
                Isotherms without a value go last.
  --format      table: a ranked text table, one row per isotherm (sorbent,
                adsorbate, T in K, best model, q_sat in mol/kg, Henry constant
                in mol/kg/Pa, points, flags). json: everything, including every
                model's parameters, standard errors, 95 % intervals and
                criteria (null where a value does not exist). csv, parquet:
                the summary table, one row per isotherm; with --fits the fit
                table, one row per isotherm and model, parameters as
                param_<name>, stderr_<name>, ci95_low_<name>, ci95_high_<name>.

examples:
  sorbrank fit screen.csv
  sorbrank fit run1.csv run2.json --models langmuir,sips --top 20
  sorbrank fit screen.csv --sort henry_mol_per_kg_pa --format csv --out ranked.csv
  sorbrank fit screen.parquet --fits --format parquet --out fits.parquet

exit status: 0 at least one isotherm has a selected model; 1 nothing could be
fitted (every isotherm rejected or without an acceptable model); 2 usage error
or an input file that cannot be read at all."""


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "fit",
        help="fit, select and rank the isotherms of local files",
        description=DESCRIPTION,
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("inputs", nargs="+", metavar="INPUT",
                        help="batch files (CSV, JSON or Parquet; format from the content/suffix)")
    parser.add_argument("--models", default="all", metavar="all|ID,ID",
                        help="models to fit (default: all)")
    parser.add_argument("--criterion", choices=CRITERIA, default="aicc",
                        help="information criterion that selects the model (default: aicc)")
    parser.add_argument("--weighting", choices=WEIGHTINGS, default="uniform",
                        help="least-squares weights (default: uniform)")
    parser.add_argument("--format", choices=FORMATS, default="table", dest="fmt",
                        help="output format (default: table)")
    parser.add_argument("--out", metavar="PATH", default=None,
                        help="write here instead of standard output (required for parquet)")
    parser.add_argument("--sort", metavar="COLUMN", default=None,
                        help=f"summary column to rank by (default: {DEFAULT_SORT})")
    parser.add_argument("--ascending", action="store_true",
                        help="smallest numbers first")
    parser.add_argument("--top", metavar="N", type=_positive_int, default=None,
                        help="keep only the first N isotherms after sorting")
    parser.add_argument("--fits", action="store_true",
                        help="csv/parquet: write the per-model fit table instead of the summary")
    parser.add_argument("--workers", metavar="N", type=_positive_int, default=None,
                        help="processes to fit with (default: all cores)")
    parser.set_defaults(func=run)


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1: {text!r}")
    return value


def _usage_error(message: str) -> int:
    print(f"sorbrank fit: error: {message}", file=sys.stderr)
    return 2


def run(args) -> int:

    import pyarrow.compute as pc

    from sorbrank.worker.intake import Limits, read_batch
    from sorbrank.worker.isotherm import Batch, IntakeError
    from sorbrank.worker.pipeline import FitOptions, process_batch

    if args.fmt == "parquet" and not args.out:
        return _usage_error("--format parquet needs --out PATH")
    if args.fits and args.fmt not in ("csv", "parquet"):
        return _usage_error("--fits applies to --format csv or parquet")
    try:
        options = FitOptions(models=args.models, criterion=args.criterion, weighting=args.weighting)
    except ValueError as exc:
        return _usage_error(str(exc))

    limits = Limits.for_local_files()
    batches = []
    for name in args.inputs:
        path = Path(name)
        if not path.is_file():
            return _usage_error(f"no such file: {name}")
        try:
            batches.append(read_batch(path, limits=limits))
        except IntakeError as exc:
            for issue in exc.issues:
                print(f"{name}: {issue}", file=sys.stderr)
            return 2
    batch = batches[0] if len(batches) == 1 else Batch(
        label="+".join(b.label for b in batches),
        isotherms=[iso for b in batches for iso in b.isotherms],
        rejected=[issue for b in batches for issue in b.rejected],
        conditions=batches[0].conditions,
        mixtures=[m for b in batches for m in b.mixtures],
    )
    for issue in batch.rejected:
        print(f"rejected: {issue}", file=sys.stderr)
    if not batch.isotherms:
        print("sorbrank fit: no acceptable isotherm in the input", file=sys.stderr)
        return 1

    workers = args.workers or os.cpu_count() or 1
    n = len(batch.isotherms)
    chunk = max(200, min(2000, math.ceil(n / (4 * workers))))
    bar = ProgressBar(sys.stderr) if sys.stderr.isatty() and n > chunk else None
    result = process_batch(batch, options, workers=workers, chunk_size=chunk, progress=bar)
    if bar:
        bar.finish()

    summary = result.summary_table()
    sort = args.sort or DEFAULT_SORT
    if sort not in summary.column_names or _is_nested(summary.schema.field(sort).type):
        if args.sort is not None:
            sortable = [f.name for f in summary.schema if not _is_nested(f.type)]
            return _usage_error(f"cannot sort by {sort!r}; columns: {', '.join(sortable)}")
        sort = "isotherm_id"
    numeric = _is_numeric(summary.schema.field(sort).type)
    order = "ascending" if (args.ascending or not numeric) else "descending"
    keys = [(sort, order, "at_end"), ("isotherm_id", "ascending", "at_end")]
    index = pc.sort_indices(summary, sort_keys=keys).to_numpy().astype("int64")
    if args.top:
        index = index[: args.top]

    if args.fmt == "json":
        doc = result.to_json()
        doc["isotherms"] = [doc["isotherms"][i] for i in index]
        _emit_text(json.dumps(doc, allow_nan=False, indent=1) + "\n", args.out)
    elif args.fmt == "table":
        _emit_text(render_table(summary.take(index), sort), args.out)
    else:
        table = _fits_rows(result.fits_table(), index, len(result.fits)) if args.fits \
            else summary.take(index)
        _write_table(table, args.fmt, args.out)

    fitted = sum(1 for b in result.selection.best if b is not None)
    if fitted == 0:
        print("sorbrank fit: no isotherm has an acceptable model", file=sys.stderr)
        return 1
    return 0


# ---------------------------------------------------------------------------
# output

TABLE_COLUMNS = [  # (summary column, header, format)
    ("sorbent_id", "sorbent", "s"),
    ("adsorbate", "gas", "s"),
    ("temperature_k", "T/K", ".2f"),
    ("best_model", "best model", "s"),
    ("q_sat_mol_per_kg", "q_sat mol/kg", ".4g"),
    ("henry_mol_per_kg_pa", "henry mol/kg/Pa", ".4g"),
    ("n_points", "n", "d"),
    ("flags", "flags", "flags"),
]


def render_table(table, sort: str) -> str:
    """A ranked plain-text table (one line per isotherm)."""
    columns = [c for c in TABLE_COLUMNS if c[0] in table.column_names]
    if sort not in {c[0] for c in columns} and sort != "isotherm_id":
        columns.insert(-1, (sort, sort, ".4g" if _is_numeric(table.schema.field(sort).type) else "s"))
    headers = ["#"] + [h for _, h, _ in columns]
    rows = []
    data = {name: table[name].to_pylist() for name, _, _ in columns}
    for i in range(table.num_rows):
        cells = [str(i + 1)]
        for name, _, fmt in columns:
            cells.append(_cell(data[name][i], fmt))
        rows.append(cells)
    widths = [max(len(r[j]) for r in rows + [headers]) for j in range(len(headers))]
    line = lambda cells: "  ".join(c.ljust(w) for c, w in zip(cells, widths)).rstrip()  # noqa: E731
    return "\n".join([line(headers), line(["-" * w for w in widths])] + [line(r) for r in rows]) + "\n"


def _cell(value, fmt: str) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-" if value is None or value != value else str(value)
    if fmt == "flags":
        return ",".join(value) if value else ""
    if fmt == "s":
        return str(value)
    return format(value, fmt)


def _fits_rows(fits_table, index, n_models: int):
    import numpy as np

    rows = (np.asarray(index)[:, None] * n_models + np.arange(n_models)[None, :]).ravel()
    return fits_table.take(rows)


def _write_table(table, fmt: str, out: str | None) -> None:
    import pyarrow as pa
    import pyarrow.csv as pcsv
    import pyarrow.parquet as pq

    if fmt == "parquet":
        pq.write_table(table, out)
        return
    # CSV has no lists: flags as "a;b", other nested values as JSON text
    for i, fld in enumerate(table.schema):
        if _is_nested(fld.type) or pa.types.is_null(fld.type):
            values = table.column(i).to_pylist()
            text = [None if v is None else (";".join(v) if fld.name == "flags" else json.dumps(v))
                    for v in values]
            table = table.set_column(i, fld.name, pa.array(text, pa.string()))
    if out:
        pcsv.write_csv(table, out)
    else:
        sink = pa.BufferOutputStream()
        pcsv.write_csv(table, sink)
        sys.stdout.write(sink.getvalue().to_pybytes().decode())


def _emit_text(text: str, out: str | None) -> None:
    if out:
        Path(out).write_text(text)
    else:
        sys.stdout.write(text)


def _is_nested(arrow_type) -> bool:
    import pyarrow as pa

    return pa.types.is_nested(arrow_type)


def _is_numeric(arrow_type) -> bool:
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
