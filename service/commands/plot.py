"""``sorbrank plot``: draw one isotherm's fit, Langmuir or BET diagnostic."""
from __future__ import annotations

import argparse
import dataclasses
import re
import sys
from pathlib import Path

from sorbrank.service.commands.fit import add_intake_options, intake_options

KINDS = ("isotherm", "langmuir-linear", "bet")
# temperatures as typed (298) name the isotherm recorded at 298.15 K
TEMPERATURE_TOLERANCE_K = 0.5

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

Choose the isotherm by --sorbent, --adsorbate and --temperature-k (within
0.5 K; --branch where adsorption and desorption were both measured), giving
as many of them as it takes to name one isotherm, or by --isotherm and its
isotherm_id. When nothing or several isotherms match, the message lists the
ones that do exist. The input is read as 'sorbrank fit' reads it, with the
same --units, --delimiter, --decimal, --gas ... options.

Only the chosen isotherm is fitted; the model choice is made by the same
engine and criteria as a full batch run."""

EPILOG = """\
examples:
  sorbrank plot screen.csv --sorbent TG31-FRAM-0001 --adsorbate CO2 --temperature-k 298.15
  sorbrank plot screen.csv --sorbent TG31-FRAM-0001 --adsorbate CO2 --temperature-k 298 --log-pressure --out fit.png
  sorbrank plot n2.csv --sorbent TG31-FRAM-0001 --adsorbate N2 --kind bet --format png --out -
  sorbrank plot screen.csv --isotherm 'TG31-FRAM-0001|CO2|298.15|adsorption'

exit status: 0 plot written, 2 unreadable input, no single matching isotherm,
or isotherm not plottable."""


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
    parser.add_argument("--sorbent", metavar="ID", default=None,
                        help="sorbent_id of the isotherm to draw")
    parser.add_argument("--adsorbate", metavar="GAS", default=None,
                        help="its adsorbate (formula or name, e.g. CO2, ethylene)")
    parser.add_argument("--temperature-k", metavar="T", type=float, default=None,
                        help=f"its temperature in K (matched within {TEMPERATURE_TOLERANCE_K} K)")
    parser.add_argument("--branch", choices=("adsorption", "desorption"), default=None,
                        help="its branch, where both were measured")
    parser.add_argument("--isotherm", metavar="ID", default=None,
                        help="or: the isotherm_id of the isotherm to draw")
    add_intake_options(parser)
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

    by_identity = (args.sorbent, args.adsorbate, args.temperature_k, args.branch)
    if args.isotherm is None and all(v is None for v in by_identity):
        return _fail("name the isotherm: --sorbent ID --adsorbate GAS --temperature-k T "
                     "(or --isotherm ID)")
    if args.isotherm is not None and any(v is not None for v in by_identity):
        return _fail("--isotherm names the isotherm alone; leave out --sorbent, --adsorbate, "
                     "--temperature-k and --branch")
    try:
        reading = intake_options(args)
    except ValueError as exc:
        return _fail(str(exc))
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
        batch = read_batch(path, **reading, limits=limits)
    except IntakeError as exc:
        return _fail(f"cannot read {args.input}:\n  " + "\n  ".join(str(i) for i in exc.issues))

    if args.isotherm is not None:
        iso = next((i for i in batch.isotherms if i.isotherm_id == args.isotherm), None)
        if iso is None:
            return _fail(_not_found_message(batch, args.isotherm))
    else:
        iso, problem = find_isotherm(batch, args.sorbent, args.adsorbate, args.temperature_k,
                                     args.branch)
        if iso is None:
            return _fail(problem)
    if args.kind == "bet" and iso.relative_pressure is None:
        return _fail(f"isotherm {iso.isotherm_id!r} has no saturation pressure: "
                     "a BET plot needs p/p0")

    # fits are per isotherm, so fitting the chosen one alone gives the same record
    single = dataclasses.replace(batch, isotherms=[iso], rejected=[])
    result = process_batch(single, FitOptions())
    record = next((r for r in result.isotherm_records()
                   if r.get("isotherm_id") == iso.isotherm_id), None)
    if record is None:
        return _fail(f"isotherm {iso.isotherm_id!r} produced no result record")

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


def find_isotherm(batch, sorbent_id: str | None, adsorbate: str | None,
                  temperature_k: float | None, branch: str | None):
    """(the one isotherm of ``batch`` matching every given criterion, None) or
    (None, a message listing what exists) when none or several match."""
    from sorbrank.worker import adsorbates

    wanted = None
    if adsorbate is not None:
        known = adsorbates.lookup(adsorbate)
        wanted = {adsorbate.strip().casefold()} | ({known.id.casefold()} if known else set())

    def matches(iso) -> bool:
        return ((sorbent_id is None or iso.sorbent_id == sorbent_id)
                and (wanted is None or iso.adsorbate.casefold() in wanted)
                and (temperature_k is None
                     or abs(iso.temperature_k - temperature_k) <= TEMPERATURE_TOLERANCE_K)
                and (branch is None or iso.branch == branch))

    found = [iso for iso in batch.isotherms if matches(iso)]
    if len(found) == 1:
        return found[0], None
    asked = ", ".join(part for part in (
        f"sorbent {sorbent_id}" if sorbent_id is not None else "",
        f"adsorbate {adsorbate}" if adsorbate is not None else "",
        f"{temperature_k:g} K (±{TEMPERATURE_TOLERANCE_K:g} K)" if temperature_k is not None else "",
        f"branch {branch}" if branch is not None else "") if part)
    if found:
        return None, (f"{len(found)} isotherms match {asked}; add --sorbent, --adsorbate, "
                      f"--temperature-k or --branch to choose one:\n  " + _listing(found))
    # what exists for the sorbent (or the whole input), so the next try can succeed
    near = [iso for iso in batch.isotherms if sorbent_id is None or iso.sorbent_id == sorbent_id]
    where = f"for sorbent {sorbent_id}" if sorbent_id is not None and near else "in the input"
    message = f"no isotherm matches {asked}; isotherms {where}:\n  " + \
        _listing(near or batch.isotherms)
    rejected = batch.rejected_isotherms
    if rejected:
        shown = ", ".join(str(r) for r in rejected[:10]) + (", ..." if len(rejected) > 10 else "")
        message += (f"\n{len(rejected)} isotherm(s) were rejected at intake ('sorbrank fit' "
                    f"says why): {shown}")
    return None, message


def _listing(isotherms, limit: int = 20) -> str:
    """One line per isotherm: sorbent, gas, temperature, branch (the first ``limit``)."""
    lines = [f"{iso.sorbent_id}  {iso.adsorbate}  {iso.temperature_k:g} K  {iso.branch}"
             for iso in isotherms[:limit]]
    if len(isotherms) > limit:
        lines.append(f"... ({len(isotherms)} in all)")
    return "\n  ".join(lines) or "none"


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
