"""``sorbrank rank``: ranked results across every batch, from a running service."""
from __future__ import annotations

import argparse
import json
import sys

HELP = "print sorbents ranked across every batch (from a running service)"
DESCRIPTION = """\
Ask a running sorbrank service for its ranking across every batch. By
default there is one row per sorbent, adsorbate, branch and temperature
(nearest 1 K): when several batches measured the same, the batch accepted
last wins. --all lists every result instead.

Units: temperature K, loading mol/kg, Henry constant mol/kg/Pa, area m2/g."""
EPILOG = """\
example:
  sorbrank rank --adsorbate CO2 --temperature-k 298.15 --sort henry_mol_per_kg_pa --limit 10
  sorbrank rank --format csv --limit 1000 > ranking.csv"""


def register(subparsers) -> None:
    from .submit import add_connection_options

    p = subparsers.add_parser("rank", help=HELP, description=DESCRIPTION, epilog=EPILOG,
                              formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--adsorbate", help="only this gas, e.g. CO2")
    p.add_argument("--temperature-k", type=float, help="only isotherms near this temperature, K")
    p.add_argument("--tolerance-k", type=float, default=0.5,
                   help="temperature window half-width, K (default 0.5)")
    p.add_argument("--sort", default="q_sat_mol_per_kg",
                   help="summary column to rank by (default q_sat_mol_per_kg)")
    p.add_argument("--order", choices=["asc", "desc"], default="desc", help="default desc")
    p.add_argument("--limit", type=int, default=20, help="rows to show (default 20)")
    p.add_argument("--offset", type=int, default=0, help="rows to skip (default 0)")
    p.add_argument("--flag", action="append", help="keep rows with this quality flag (repeatable)")
    p.add_argument("--exclude-flag", action="append",
                   help="drop rows with this quality flag (repeatable)")
    p.add_argument("--all", action="store_true", help="every result, not only the latest")
    p.add_argument("--format", choices=["table", "json", "csv"], default="table",
                   help="output format (default table)")
    add_connection_options(p)
    p.set_defaults(func=run)


def run(args) -> int:
    from ..client import ApiError, Client, ServiceUnreachable, ranked_table

    params = {"adsorbate": args.adsorbate, "temperature_k": args.temperature_k,
              "temperature_tolerance_k": args.tolerance_k if args.temperature_k is not None else None,
              "sort": args.sort, "order": args.order, "limit": args.limit, "offset": args.offset,
              "flag": args.flag, "exclude_flag": args.exclude_flag,
              "all": "true" if args.all else None}
    client = Client(args.url, args.token)
    try:
        if args.format == "csv":
            sys.stdout.write(client.rankings_bytes(params, "csv").decode())
            return 0
        doc = client.rankings_document(params)
    except ServiceUnreachable as exc:
        print(f"sorbrank rank: {exc}", file=sys.stderr)
        return 1
    except (ApiError, OSError) as exc:
        print(f"sorbrank rank: {exc}", file=sys.stderr)
        return 1
    if args.format == "json":
        json.dump(doc, sys.stdout, indent=1)
        print()
        return 0
    print(ranked_table(doc["rows"], args.sort, args.offset))
    print(f"\n{len(doc['rows'])} of {doc['total']} rows; {doc['deduplication']}", file=sys.stderr)
    return 0
