"""``sorbrank submit``: send batch files to a running service."""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

HELP = "send batch files (CSV, JSON, Parquet) to a running sorbrank service"
DESCRIPTION = """\
Send one or more batch files to a running sorbrank service (sorbrank serve).
Each file becomes one batch. The service answers once the batch is safely on
disk; isotherms with problems are reported (batch, isotherm, row, field) and
the rest are fitted. Network failures are retried with the same
Idempotency-Key, so a batch is never submitted twice.

Prints one line per file: batch id, file, isotherms accepted, isotherms
rejected. With --wait, shows progress on stderr and prints the final state.
Exit status: 0 every file was accepted as a batch (and, with --wait, finished
done); isotherms rejected inside a batch do not change it; 1 otherwise,
including when no service answers at the address (the message says how to
start one)."""
EPILOG = """\
example:
  sorbrank submit run1.csv run2.parquet --wait     # columns pressure_kpa, loading_mmol_per_g
  sorbrank submit plain.csv --pressure-unit kPa --loading-unit mmol/g
  SORBRANK_TOKEN=... sorbrank submit --url http://fitbox:8000 campaign/*.json"""


def register(subparsers) -> None:
    p = subparsers.add_parser("submit", help=HELP, description=DESCRIPTION, epilog=EPILOG,
                              formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("files", nargs="+", type=Path, metavar="FILE",
                   help="batch file: .csv, .json or .parquet")
    add_connection_options(p)
    p.add_argument("--wait", action="store_true",
                   help="wait until every batch is finished, showing progress on stderr")
    p.add_argument("--timeout-s", type=float, default=3600.0,
                   help="with --wait: give up after this many seconds (default 3600)")
    p.add_argument("--units", metavar="QUANTITY:UNIT,...",
                   help="units of plain pressure/loading columns, e.g. pressure:kPa,loading:mmol/g")
    p.add_argument("--pressure-unit",
                   help="unit of a plain 'pressure' column, e.g. kPa, bar (columns such as "
                        "pressure_kpa carry their own)")
    p.add_argument("--loading-unit",
                   help="unit of a plain 'loading' column, e.g. mmol/g (columns such as "
                        "loading_mmol_per_g carry their own)")
    p.add_argument("--sample-mass-g", type=float,
                   help="sample mass in grams, for loadings given as absolute amounts")
    p.add_argument("--label", help="batch label (default: from the file, else a content hash)")
    p.add_argument("--models", help="'all' (default) or comma-separated model ids")
    p.add_argument("--criterion", choices=["aicc", "aic", "bic"], help="model selection (default aicc)")
    p.add_argument("--weighting", help="least-squares weighting: uniform (default), relative, sigma")
    p.set_defaults(func=run)


def add_connection_options(p) -> None:
    p.add_argument("--url", help="service address (default $SORBRANK_URL or http://127.0.0.1:8000)")
    p.add_argument("--token", help="bearer token (default $SORBRANK_TOKEN)")


def run(args) -> int:
    from ..client import ApiError, Client, ServiceUnreachable, progress_printer

    from sorbrank.worker.units import declaration_from_options  # as 'sorbrank fit' reads them

    try:
        units = declaration_from_options(args.units, args.pressure_unit, args.loading_unit)
    except ValueError as exc:
        print(f"sorbrank submit: error: {exc}", file=sys.stderr)
        return 2
    client = Client(args.url, args.token)
    options = {"units": units, "sample_mass_g": args.sample_mass_g,
               "batch_label": args.label, "models": args.models, "criterion": args.criterion,
               "weighting": args.weighting}
    ok = True
    submitted = []
    for path in args.files:
        try:
            batch = client.submit(path, **options)
        except ServiceUnreachable as exc:
            print(f"sorbrank submit: {exc}", file=sys.stderr)
            return 1
        except (ApiError, OSError, ValueError) as exc:
            ok = False
            print(f"{path}: not accepted: {exc}", file=sys.stderr)
            for issue in getattr(exc, "problem", {}).get("issues", [])[:20]:
                print(f"  {issue['message']}", file=sys.stderr)
            continue
        print(f"{batch.id}\t{path}\taccepted {batch.accepted}\t"
              f"rejected {len(batch.rejected)} issue(s)", flush=True)
        for issue in batch.rejected[:20]:
            print(f"  {issue['message']}", file=sys.stderr)
        submitted.append((path, batch))
    if args.wait:
        for path, batch in submitted:
            try:
                status = client.wait(batch.id, progress_printer(path.name), args.timeout_s)
            except ServiceUnreachable as exc:
                print(f"sorbrank submit: {exc}", file=sys.stderr)
                return 1
            except (ApiError, OSError, TimeoutError) as exc:
                print(f"{batch.id}: {exc}", file=sys.stderr)
                ok = False
                continue
            print(f"{batch.id}\t{status['state']}\tdone {status['counts']['done']}\t"
                  f"failed {status['counts']['failed']}")
            ok = ok and status["state"] == "done"
    return 0 if ok else 1
