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
done); isotherms rejected inside a batch do not change it; 1 otherwise."""
EPILOG = """\
example:
  sorbrank submit run1.csv run2.parquet --pressure-unit kPa --loading-unit mmol/g --wait
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
    p.add_argument("--pressure-unit", help="unit of pressures the file does not name, e.g. kPa, bar")
    p.add_argument("--loading-unit", help="unit of loadings the file does not name, e.g. mmol/g")
    p.add_argument("--label", help="batch label (default: from the file, else a content hash)")
    p.add_argument("--models", help="'all' (default) or comma-separated model ids")
    p.add_argument("--criterion", choices=["aicc", "aic", "bic"], help="model selection (default aicc)")
    p.add_argument("--weighting", help="least-squares weighting: uniform (default), relative, sigma")
    p.set_defaults(func=run)


def add_connection_options(p) -> None:
    p.add_argument("--url", help="service address (default $SORBRANK_URL or http://127.0.0.1:8000)")
    p.add_argument("--token", help="bearer token (default $SORBRANK_TOKEN)")


def run(args) -> int:
    from ..client import ApiError, Client, progress_printer

    client = Client(args.url, args.token)
    params = {"pressure_unit": args.pressure_unit, "loading_unit": args.loading_unit,
              "batch_label": args.label, "models": args.models, "criterion": args.criterion,
              "weighting": args.weighting}
    ok = True
    submitted = []
    for path in args.files:
        try:
            reply = client.submit_file(path, params)
        except (ApiError, OSError, ValueError) as exc:
            ok = False
            print(f"{path}: not accepted: {exc}", file=sys.stderr)
            for issue in getattr(exc, "problem", {}).get("issues", [])[:20]:
                print(f"  {issue['message']}", file=sys.stderr)
            continue
        print(f"{reply['batch_id']}\t{path}\taccepted {reply['accepted']}\t"
              f"rejected {len(reply['rejected'])} issue(s)", flush=True)
        for issue in reply["rejected"][:20]:
            print(f"  {issue['message']}", file=sys.stderr)
        submitted.append((path, reply["batch_id"]))
    if args.wait:
        for path, batch_id in submitted:
            try:
                status = client.wait(batch_id, progress_printer(path.name), args.timeout_s)
            except (ApiError, OSError, TimeoutError) as exc:
                print(f"{batch_id}: {exc}", file=sys.stderr)
                ok = False
                continue
            print(f"{batch_id}\t{status['state']}\tdone {status['counts']['done']}\t"
                  f"failed {status['counts']['failed']}")
            ok = ok and status["state"] == "done"
    return 0 if ok else 1
