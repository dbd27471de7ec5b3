"""``sorbrank rank``: ranked results across every batch, from a running service."""
from __future__ import annotations

import argparse
import json
import sys

# the store's DEFAULT_RANKING_SORT, spelled here so that --help imports no pyarrow
DEFAULT_SORT = "loading_ads_mol_per_kg"
HELP = "print sorbents ranked across every batch (from a running service)"
DESCRIPTION = """\
Ask a running sorbrank service for its ranking across every batch. By
default there is one row per sorbent, adsorbate, branch and temperature
(nearest 1 K): when several batches measured the same, the batch accepted
last wins. --all lists every result instead. Every matching row is printed
unless --limit is given (the service's pages are followed; --format csv is
its complete export). --adsorbate is matched as intake stores gas names
(co2 is CO2); a name intake does not know is refused, with a suggestion.

The default sort is the loading at the batch's adsorption pressure
(loading_ads_mol_per_kg); rows whose sorted figure is unreliable (an
extrapolation, or a q_sat with a relative standard error above 25 %) come
last unless --unreliable-in-place. When the ranked rows were computed at
different pressures or temperatures, a warning lists them (docs/results.md,
"Default ranking").

Units: temperature K, loading mol/kg, Henry constant mol/kg/Pa, area m2/g."""
EPILOG = """\
example:
  sorbrank rank --adsorbate CO2 --temperature-k 298.15 --sort henry_mol_per_kg_pa --limit 10
  sorbrank rank --format csv > ranking.csv      # every matching row"""


def register(subparsers) -> None:
    from .submit import add_connection_options

    p = subparsers.add_parser("rank", help=HELP, description=DESCRIPTION, epilog=EPILOG,
                              formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--adsorbate", help="only this gas, e.g. CO2")
    p.add_argument("--temperature-k", type=float, help="only isotherms near this temperature, K")
    p.add_argument("--tolerance-k", type=float, default=0.5,
                   help="temperature window half-width, K (default 0.5)")
    p.add_argument("--sort", default=DEFAULT_SORT,
                   help=f"summary column to rank by (default {DEFAULT_SORT})")
    p.add_argument("--unreliable-in-place", action="store_true",
                   help="rank rows whose sorted figure is unreliable in place, not last")
    p.add_argument("--order", choices=["asc", "desc"], default="desc", help="default desc")
    p.add_argument("--limit", type=int, default=None,
                   help="rows to show (default every matching row)")
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
    from ..client import RANK_COLUMNS, ApiError, Client, ServiceUnreachable, format_table

    params = {"adsorbate": args.adsorbate, "temperature_k": args.temperature_k,
              "temperature_tolerance_k": args.tolerance_k if args.temperature_k is not None else None,
              "sort": args.sort, "order": args.order, "limit": args.limit, "offset": args.offset,
              "flag": args.flag, "exclude_flag": args.exclude_flag,
              "all": "true" if args.all else None,
              "unreliable_last": "false" if args.unreliable_in_place else None}
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
    columns = list(RANK_COLUMNS)
    if args.sort not in columns:
        columns.insert(4, args.sort)
    # the conditions and the reliability of the sorted figure, beside it
    at = columns.index(args.sort) + 1
    columns[at:at] = [c for c in _condition_columns(doc) if c not in columns]
    numbered = [{"rank": args.offset + i + 1, **row} for i, row in enumerate(doc["rows"])]
    print(format_table(numbered, ["rank"] + columns))
    start = f" from row {args.offset + 1}" if args.offset else ""
    print(f"\n{len(doc['rows'])} of {doc['total']} matching rows{start}; {doc['deduplication']}",
          file=sys.stderr)
    if doc.get("reliability_column") and doc.get("unreliable_last"):
        print(f"rows whose {doc['reliability_column']} is false come last "
              "(--unreliable-in-place ranks them in place)", file=sys.stderr)
    if doc.get("mixed_conditions"):
        print(mixed_conditions_warning(doc["sort"], doc["condition_sets"]), file=sys.stderr)
    return 0


def _condition_columns(doc: dict) -> list[str]:
    """The reliability and condition columns shown beside the sorted figure."""
    shown = [doc["reliability_column"]] if doc.get("reliability_column") else []
    return shown + [c for c in ("adsorption_pressure_pa", "desorption_pressure_pa")
                    if doc["rows"] and c in doc["rows"][0]]


def mixed_conditions_warning(sort: str, condition_sets: list[dict]) -> str:
    """'warning: ... computed at 2 sets of conditions: ...' (also used by 'sorbrank fit')."""
    def describe(c: dict) -> str:
        parts = [f"{name} {value:g}" for name, value in c.items()
                 if name != "rows" and value is not None]
        return ", ".join(parts or ["unknown"]) + f" ({c['rows']} rows)"
    listed = "; ".join(describe(c) for c in condition_sets[:6])
    more = "; ..." if len(condition_sets) > 6 else ""
    return (f"warning: these rows' {sort} was computed at {len(condition_sets)} different sets "
            f"of conditions: {listed}{more}; filter by temperature or batch to compare like "
            "with like")
