"""The ``sorbrank`` command. Each subcommand lives in service/commands/<name>.py
and exposes ``register(subparsers)``; this module only wires them together, so
a missing optional dependency of one command never breaks the others."""
from __future__ import annotations

import argparse
import importlib
import sys

# order = order shown in --help
COMMANDS = ["fit", "serve", "worker", "submit", "rank", "demo", "plot", "models", "migrate_store"]

DESCRIPTION = """\
sorbrank fits published isotherm models to sorbent screening data, picks the
model the data support (AICc by default), derives capacity, site density,
Henry constant, BET area, working capacity, isosteric heat and IAST
selectivity, and ranks candidates across every batch.

Every number sorbrank prints or stores is in canonical units: pressure Pa,
temperature K, loading mol/kg, energy J/mol, area m2/g."""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="sorbrank",
        description=DESCRIPTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="Run 'sorbrank COMMAND --help' for what each command does and its options.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for name in COMMANDS:
        try:
            module = importlib.import_module(f"sorbrank.service.commands.{name}")
        except ModuleNotFoundError as exc:
            if exc.name == f"sorbrank.service.commands.{name}":
                continue  # command not built yet
            raise
        module.register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
