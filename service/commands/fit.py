"""``sorbrank fit``: fit, select and rank the isotherms of local files."""
from __future__ import annotations

import argparse
import math
import os
import sys
from pathlib import Path

# re-exported: the web pages, 'sorbrank plot', the benchmarks and tests use them from here
from .fit_output import (  # noqa: F401
    ProgressBar,
    emit_bytes,
    emit_text,
    fits_rows,
    is_nested,
    is_numeric,
    json_bytes,
    pressure_swing,
    render_table,
    terminal_width,
    write_table,
)

FORMATS = ("table", "json", "csv", "parquet")
CRITERIA = ("aicc", "bic", "aic")
WEIGHTINGS = ("uniform", "relative", "sigma")
# the store's DEFAULT_RANKING_SORT (fit and rank rank alike), spelled here so
# that --help imports no pyarrow
DEFAULT_SORT = "loading_ads_mol_per_kg"
DELIMITERS = {"auto": None, "comma": ",", "semicolon": ";", "tab": "\t"}
DECIMALS = {"auto": None, "point": ".", "comma": ","}

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

Input: CSV, JSON or Parquet files as described in docs/formats.md (one row per
point: sorbent_id, adsorbate, temperature_k and pressure, loading columns
whose names carry their units, e.g. pressure_kpa, loading_mmol_per_g; or
plain pressure, loading columns with the units declared by --units, by
--pressure-unit/--loading-unit or in the file's '# units:' line). CSV may be
comma-, semicolon- or tab-delimited, with decimal points or commas (detected,
or set by --delimiter/--decimal). Isotherms that fail validation are listed
on standard error with the reason and left out; the rest are fitted.

Every number printed or written is in canonical units: pressure Pa,
temperature K, loading mol/kg, energy J/mol, area m2/g."""

EPILOG = """\
options in detail:
  --units       the one units declaration for plain pressure/loading columns,
                e.g. pressure:kPa,loading:mmol/g (also saturation_pressure,
                loading_sigma). Applies to every input file; a file's own
                '# units:' line and unit-carrying column names take precedence.
  --pressure-unit, --loading-unit
                the same declaration one quantity at a time: --pressure-unit kPa
                is --units pressure:kPa. Pressure units: Pa, kPa, MPa, bar, mbar,
                atm, torr, mmHg, psi, p/p0 (relative); loading units: mol/kg,
                mmol/g, mol/g, mg/g, g/g, wt%, cm3(STP)/g, and the absolute
                amounts mmol, mol, cm3(STP) (these need --sample-mass-g).
  --sample-mass-g
                sample mass in g, dividing loadings given as absolute amounts
                (mmol, mol, cm3(STP)) to per gram of sorbent.
  --delimiter, --decimal
                CSV only. auto (default) detects comma, semicolon or tab, and a
                decimal point or comma; name them when detection cannot tell.
  --gas         a gas sorbrank does not know, as NAME:MOLAR_MASS_G_PER_MOL or
                NAME:MOLAR_MASS_G_PER_MOL:CRITICAL_TEMPERATURE_K (repeat for
                more gases), e.g. --gas R134a:102.03:374.21. The molar mass
                converts mass and gas-volume loadings; the critical
                temperature marks isotherms above it as supercritical.
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
  --absolute-sigma  with --weighting sigma: the sigma is calibrated, so the
                covariance is not rescaled by the residual variance and each
                fit reports a chi-square test (docs/results.md).
  --sort        a column of the summary table (see --format csv), e.g.
                loading_ads_mol_per_kg (default: the loading at the
                adsorption pressure), q_sat_mol_per_kg, henry_mol_per_kg_pa,
                working_capacity_mol_per_kg, sorbent_id. Numbers sort
                largest first, text A-Z; --ascending reverses numbers.
                Isotherms without a value go last, and so do those whose
                figure is unreliable (an extrapolation; q_sat: also a standard
                error above 25 %) unless --unreliable-in-place; a warning
                says when the rows were computed at different temperatures.
  --format      table: a ranked text table, one row per isotherm: sorbent, gas,
                T in K, best model, q_sat in mol/kg with its 95 % interval
                [low, high], BET area in m2/g, working capacity in mol/kg with
                its pressure swing (adsorption -> desorption), points, flags;
                '—' where a figure does not exist. json: everything, including every
                model's parameters, standard errors, 95 % intervals and
                criteria (null where a value does not exist). csv, parquet:
                the summary table, one row per isotherm; with --fits the fit
                table, one row per isotherm and model, parameters as
                param_<name>, stderr_<name>, ci95_low_<name>, ci95_high_<name>.
                CSV writes lists as PostgreSQL array literals {a,b}, floats in
                their shortest round-trip form, no value as an empty cell
                (docs/formats.md, "Exports"; the same as the API's CSV).

examples:
  sorbrank fit screen.csv
  sorbrank fit rig7.csv --units pressure:kPa,loading:mmol/g
  sorbrank fit export.csv --delimiter semicolon --decimal comma --pressure-unit bar --loading-unit mg/g
  sorbrank fit r134a.csv --gas R134a:102.03:374.21 --units pressure:kPa,loading:mg/g
  sorbrank fit run1.csv run2.json --models langmuir,sips --top 20
  sorbrank fit screen.csv --sort henry_mol_per_kg_pa --format csv --out ranked.csv
  sorbrank fit screen.parquet --fits --format parquet --out fits.parquet

exit status: 0 at least one isotherm has a selected model; 1 nothing could be
fitted (every isotherm rejected or without an acceptable model); 2 usage error
or an input file that cannot be read at all (wrong delimiter, missing column,
...): the message names the file."""


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
    add_intake_options(parser)
    parser.add_argument("--models", default="all", metavar="all|ID,ID",
                        help="models to fit (default: all)")
    parser.add_argument("--criterion", choices=CRITERIA, default="aicc",
                        help="information criterion that selects the model (default: aicc)")
    parser.add_argument("--weighting", choices=WEIGHTINGS, default="uniform",
                        help="least-squares weights (default: uniform)")
    parser.add_argument("--absolute-sigma", action="store_true",
                        help="with --weighting sigma: take the sigma as calibrated")
    parser.add_argument("--format", choices=FORMATS, default="table", dest="fmt",
                        help="output format (default: table)")
    parser.add_argument("--out", metavar="PATH", default=None,
                        help="write here instead of standard output (required for parquet)")
    parser.add_argument("--sort", metavar="COLUMN", default=None,
                        help=f"summary column to rank by (default: {DEFAULT_SORT})")
    parser.add_argument("--ascending", action="store_true",
                        help="smallest numbers first")
    parser.add_argument("--unreliable-in-place", action="store_true",
                        help="rank isotherms whose sorted figure is unreliable in place, not last")
    parser.add_argument("--top", metavar="N", type=_positive_int, default=None,
                        help="keep only the first N isotherms after sorting")
    parser.add_argument("--fits", action="store_true",
                        help="csv/parquet: write the per-model fit table instead of the summary")
    parser.add_argument("--workers", metavar="N", type=_positive_int, default=None,
                        help="processes to fit with (default: all cores)")
    parser.set_defaults(func=run)


def add_intake_options(parser) -> None:
    """The options that say how to read input files (shared with 'sorbrank plot')."""
    parser.add_argument("--units", metavar="QUANTITY:UNIT,...", default=None,
                        help="units of plain pressure/loading columns, e.g. pressure:kPa,loading:mmol/g")
    parser.add_argument("--pressure-unit", metavar="UNIT", default=None,
                        help="pressure unit of a plain pressure column (fills --units)")
    parser.add_argument("--loading-unit", metavar="UNIT", default=None,
                        help="loading unit of a plain loading column (fills --units)")
    parser.add_argument("--sample-mass-g", metavar="G", type=_positive_float, default=None,
                        help="sample mass in g, for loadings given as absolute amounts")
    parser.add_argument("--delimiter", choices=tuple(DELIMITERS), default="auto",
                        help="CSV field delimiter (default: auto)")
    parser.add_argument("--decimal", choices=tuple(DECIMALS), default="auto",
                        help="CSV decimal mark (default: auto)")
    parser.add_argument("--gas", metavar="NAME:MOLAR_MASS[:TC_K]", action="append", default=[],
                        type=_declared_gas, dest="gases",
                        help="declare a gas: molar mass in g/mol, optional critical "
                             "temperature in K (repeatable)")


def intake_options(args) -> dict:
    """read_batch keyword arguments from the options of ``add_intake_options``.
    Raises ValueError for a units declaration that cannot be used."""
    return {"units": units_declaration(args), "sample_mass_g": args.sample_mass_g,
            "delimiter": DELIMITERS[args.delimiter], "decimal": DECIMALS[args.decimal],
            "gases": args.gases or None}


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1: {text!r}")
    return value


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not (value > 0 and math.isfinite(value)):
        raise argparse.ArgumentTypeError(f"must be a positive number: {text!r}")
    return value


def _declared_gas(text: str) -> dict:
    """A --gas value as read_batch's declared-gas dict."""
    parts = text.split(":")
    if len(parts) not in (2, 3) or not parts[0].strip():
        raise argparse.ArgumentTypeError(
            f"expected NAME:MOLAR_MASS_G_PER_MOL[:CRITICAL_TEMPERATURE_K], got {text!r}")
    gas = {"name": parts[0].strip()}
    for key, value in zip(("molar_mass_g_per_mol", "critical_temperature_k"), parts[1:]):
        try:
            gas[key] = _positive_float(value)
        except argparse.ArgumentTypeError as exc:
            raise argparse.ArgumentTypeError(f"--gas {text!r}: {key}: {exc}") from None
    return gas


def units_declaration(args) -> dict[str, str] | None:
    """The one units declaration from --units, --pressure-unit and --loading-unit
    (canonical unit names), None when none was given. Raises ValueError."""
    from sorbrank.worker.units import declaration_from_options

    return declaration_from_options(args.units, args.pressure_unit, args.loading_unit)


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
        options = FitOptions(models=args.models, criterion=args.criterion, weighting=args.weighting,
                             absolute_sigma=args.absolute_sigma)
    except ValueError as exc:
        return _usage_error(str(exc))

    try:
        reading = intake_options(args)
    except ValueError as exc:
        return _usage_error(str(exc))

    limits = Limits.for_local_files()
    batches = []
    for name in args.inputs:
        path = Path(name)
        if not path.is_file():
            return _usage_error(f"no such file: {name}")
        try:
            batches.append(read_batch(path, **reading, limits=limits))
        except IntakeError as exc:
            for issue in exc.issues:
                print(f"{name}: {issue}", file=sys.stderr)
            return 2
    batch = Batch.combined(batches)
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

    import pyarrow as pa

    from sorbrank.worker.store import (RELIABILITY_OF_SORT, RankingQuery, condition_sets,
                                       conditions_of_sort, reliable_rows, with_ranking_columns)

    cond = result.batch.conditions
    swing = (cond.adsorption_pressure_pa, cond.desorption_pressure_pa)
    summary = result.summary_table()
    summary = with_ranking_columns(summary, [swing] * summary.num_rows)
    sort = args.sort or DEFAULT_SORT
    if sort not in summary.column_names or is_nested(summary.schema.field(sort).type):
        if args.sort is not None:
            sortable = [f.name for f in summary.schema if not is_nested(f.type)]
            return _usage_error(f"cannot sort by {sort!r}; columns: {', '.join(sortable)}")
        sort = "isotherm_id"
    numeric = is_numeric(summary.schema.field(sort).type)
    order = "ascending" if (args.ascending or not numeric) else "descending"
    keys = [(sort, order, "at_end"), ("isotherm_id", "ascending", "at_end")]
    reliability = None if args.unreliable_in_place else RELIABILITY_OF_SORT.get(sort)
    ranked = summary
    if reliability is not None:  # the same order as 'sorbrank rank': unreliable rows last
        ranked = summary.append_column("_demoted", pa.array(~reliable_rows(summary, reliability)))
        keys.insert(0, ("_demoted", "ascending"))
    index = pc.sort_indices(ranked, sort_keys=keys).to_numpy().astype("int64")
    mixed = condition_sets(summary, lambda _batch: swing, conditions_of_sort(sort),
                           RankingQuery().temperature_tolerance_k)
    if len(mixed) > 1:
        from .rank import mixed_conditions_warning

        print(f"sorbrank fit: {mixed_conditions_warning(sort, mixed)}", file=sys.stderr)
    if args.top:
        index = index[: args.top]

    if args.fmt == "json":
        doc = result.to_json()
        doc["isotherms"] = [doc["isotherms"][i] for i in index]
        emit_bytes(json_bytes(doc), args.out)
    elif args.fmt == "table":
        width = terminal_width() if args.out is None else None
        emit_text(render_table(summary.take(index), sort, result.batch.conditions, width),
                   args.out)
    else:
        table = fits_rows(result.fits_table(), index, len(result.fits)) if args.fits \
            else summary.take(index)
        write_table(table, args.fmt, args.out)

    fitted = sum(1 for b in result.selection.best if b is not None)
    if fitted == 0:
        print("sorbrank fit: no isotherm has an acceptable model", file=sys.stderr)
        return 1
    return 0
