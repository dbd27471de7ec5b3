"""``sorbrank plot``: draw one isotherm's fit, Langmuir or BET diagnostic."""
from __future__ import annotations

import argparse
import dataclasses
import re
import sys
from pathlib import Path

KINDS = ("isotherm", "langmuir-linear", "bet")

DESCRIPTION = """\
Fit one isotherm of an input file with the default options of 'sorbrank fit'
(every model, AICc, uniform weights), then draw it.

Kinds of plot:
  isotherm         measured points, the selected model and the runner-up
                   (legend gives each model's AICc and Akaike weight), with
                   the residuals of the selected model in a panel below.
                   Pressure is shown in kPa, loading in mol/kg.
  langmuir-linear  1/q against 1/p with the linearised Langmuir line; its
                   intercept (1/q_sat) and slope (1/(q_sat b)) are written on
                   the plot. A straight line means Langmuir describes the data.
  bet              x/(q(1-x)) against x = p/p0, the relative-pressure range
                   chosen for the BET area shaded, and the fitted BET line.
                   Needs a saturation pressure p0 for the isotherm.

Only the chosen isotherm is fitted; the model choice is made by the same
engine and criteria as a full batch run."""

EPILOG = """\
examples:
  sorbrank plot screen.csv --isotherm MOF-5_CO2_298K
  sorbrank plot screen.csv --isotherm MOF-5_CO2_298K --log-pressure --out fit.png
  sorbrank plot n2.json --isotherm S12_N2_77K --kind bet --format png --out -

exit status: 0 plot written, 2 unreadable input or isotherm not plottable."""


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "plot",
        help="draw an isotherm fit, its Langmuir linearisation or its BET plot",
        description=DESCRIPTION,
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("input", metavar="INPUT",
                        help="batch file (CSV, JSON or Parquet, as accepted by 'sorbrank fit')")
    parser.add_argument("--isotherm", required=True, metavar="ID",
                        help="isotherm_id of the isotherm to draw")
    parser.add_argument("--kind", choices=KINDS, default="isotherm",
                        help="which plot (default: isotherm)")
    parser.add_argument("--log-pressure", action="store_true",
                        help="logarithmic pressure axis (isotherm kind only); shows the "
                             "low-pressure Henry region. Points at zero pressure are left out.")
    parser.add_argument("--format", choices=("svg", "png"), default=None, dest="fmt",
                        help="image format (default: from the --out suffix, else svg)")
    parser.add_argument("--out", metavar="PATH", default=None,
                        help="where to write the image; '-' writes to standard output "
                             "(default: <isotherm>_<kind>.<format> in the current directory)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    # imported here so 'sorbrank --help' works without the plotting stack
    from sorbrank.service import plots
    from sorbrank.worker.intake import Limits, read_batch
    from sorbrank.worker.isotherm import IntakeError
    from sorbrank.worker.pipeline import FitOptions, process_batch

    fmt = _choose_format(args.fmt, args.out)
    if args.log_pressure and args.kind != "isotherm":
        print("sorbrank plot: --log-pressure applies to the isotherm kind only; ignored",
              file=sys.stderr)
    path = Path(args.input)
    if not path.is_file():
        return _fail(f"no such file: {args.input}")
    limits = Limits.for_local_files()
    try:
        # a Path, not a str: read_batch takes a str as the file's content
        batch = read_batch(path, limits=limits)
    except IntakeError as exc:
        return _fail(f"cannot read {args.input}:\n  " + "\n  ".join(str(i) for i in exc.issues))

    iso = next((i for i in batch.isotherms if i.isotherm_id == args.isotherm), None)
    if iso is None:
        return _fail(_not_found_message(batch, args.isotherm))
    if args.kind == "bet" and iso.relative_pressure is None:
        return _fail(f"isotherm {args.isotherm!r} has no saturation pressure: "
                     "a BET plot needs p/p0")

    # fits are per isotherm, so fitting the chosen one alone gives the same record
    single = dataclasses.replace(batch, isotherms=[iso], rejected=[])
    result = process_batch(single, FitOptions())
    record = next((r for r in result.isotherm_records()
                   if r.get("isotherm_id") == iso.isotherm_id), None)
    if record is None:
        return _fail(f"isotherm {args.isotherm!r} produced no result record")

    if args.kind == "isotherm":
        image = plots.isotherm_plot(iso.pressure_pa, iso.loading_mol_per_kg, record,
                                    log_pressure=args.log_pressure, fmt=fmt,
                                    saturation_pressure_pa=iso.saturation_pressure_pa,
                                    temperature_k=iso.temperature_k)
    elif args.kind == "langmuir-linear":
        image = plots.langmuir_linear_plot(iso.pressure_pa, iso.loading_mol_per_kg, record,
                                           fmt=fmt)
    else:
        image = plots.bet_plot(iso.relative_pressure, iso.loading_mol_per_kg,
                               record.get("summary") or {}, fmt=fmt)

    if args.out == "-":
        sys.stdout.buffer.write(image)
        sys.stdout.flush()
        return 0
    out = Path(args.out) if args.out else Path(f"{_safe_name(iso.isotherm_id)}_{args.kind}.{fmt}")
    out.write_bytes(image)
    print(f"wrote {out} ({args.kind}, {fmt}, {len(image)} bytes)", file=sys.stderr)
    return 0


def _choose_format(fmt: str | None, out: str | None) -> str:
    if fmt:
        return fmt
    suffix = Path(out).suffix.lower().lstrip(".") if out and out != "-" else ""
    return suffix if suffix in ("svg", "png") else "svg"


def _not_found_message(batch, isotherm_id: str) -> str:
    reasons = [str(i) for i in batch.rejected if i.isotherm == isotherm_id]
    if reasons:
        return f"isotherm {isotherm_id!r} was rejected at intake:\n  " + "\n  ".join(reasons)
    known = [i.isotherm_id for i in batch.isotherms]
    shown = ", ".join(known[:20]) + (f", ... ({len(known)} in all)" if len(known) > 20 else "")
    return f"no isotherm {isotherm_id!r} in the input; isotherms present: {shown or 'none'}"


def _safe_name(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", text).strip("._") or "isotherm"


def _fail(message: str) -> int:
    print(f"sorbrank plot: {message}", file=sys.stderr)
    return 2
