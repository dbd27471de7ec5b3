"""The ``sorbrank`` command. Each subcommand lives in service/commands/<name>.py
(a command's dashes are underscores there: migrate-store in migrate_store.py)
and exposes ``register(subparsers)``; this module only wires them together, so
a missing optional dependency of one command never breaks the others."""
from __future__ import annotations

import argparse
import importlib
import sys

# order = order shown in --help
COMMANDS = ["fit", "serve", "worker", "submit", "rank", "demo", "plot", "models", "migrate-store"]

DESCRIPTION = """\
sorbrank fits published isotherm models to sorbent screening data, picks the
model the data support (AICc by default), derives capacity, site density,
Henry constant, BET area, working capacity, isosteric heat and IAST
selectivity, and ranks candidates across every batch.

Every number sorbrank prints or stores is in canonical units: pressure Pa,
temperature K, loading mol/kg, energy J/mol, area m2/g."""


def build_parser(argv: list[str] | None = None) -> argparse.ArgumentParser:
    """The parser for ``argv``: only the named command's module is imported
    when ``argv`` starts with a known command (a start-up cost every run
    would pay otherwise); every command for --help, errors or ``argv=None``."""
    parser = argparse.ArgumentParser(
        prog="sorbrank",
        description=DESCRIPTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="Run 'sorbrank COMMAND --help' for what each command does and its options.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    chosen = argv[0] if argv and argv[0] in COMMANDS else None
    for name in [chosen] if chosen else COMMANDS:
        module_name = f"sorbrank.service.commands.{name.replace('-', '_')}"
        importlib.import_module(module_name).register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    args = build_parser(argv).parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
