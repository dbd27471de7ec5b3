"""``sorbrank models``: the model catalogue, as text or JSON."""
from __future__ import annotations

import argparse
import json
import sys

HELP = """\
List the isotherm models sorbrank fits: id, equation, parameters with their
canonical units and bounds, and the published source. Models marked p/p0
take relative pressure and apply only where a saturation pressure exists;
models marked opt-in are fitted only when named (--models all,ID).

examples:
  sorbrank models
  sorbrank models --format json"""


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "models", help="list the model catalogue", description=HELP,
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--format", choices=("text", "json"), default="text",
                        help="text (default) or json (the same document as GET /api/v1/models)")
    parser.set_defaults(func=run)


def run(args) -> int:
    # imported here: 'sorbrank --help' lists this command without loading the models
    from sorbrank.worker.models import catalogue_description

    catalogue = catalogue_description()
    if args.format == "json":
        json.dump(catalogue, sys.stdout, indent=2)
        sys.stdout.write("\n")
        return 0
    for model in catalogue:
        tag = "  [p/p0]" if model["relative_pressure"] else ""
        if not model["in_default_catalogue"]:
            tag += "  [opt-in: fitted only when named in --models]"
        print(f"{model['id']}{tag}\n  {model['equation']}")
        for p in model["parameters"]:
            lo = "-inf" if p["lower"] is None else f"{p['lower']:g}"
            hi = "inf" if p["upper"] is None else f"{p['upper']:g}"
            print(f"    {p['name']:<14} [{p['unit']}]  {lo} .. {hi}  {p['meaning']}")
        print(f"  source: {model['reference']}\n")
    return 0
