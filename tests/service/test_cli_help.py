"""Every ``sorbrank`` command is listed by ``sorbrank --help`` and has a
``--help`` that teaches (a description and at least one example)."""
from __future__ import annotations

import json
import subprocess
import sys

import pytest

from sorbrank.service.cli import COMMANDS, build_parser
from sorbrank.worker.models import CATALOGUE


def _help(*argv: str) -> str:
    out = subprocess.run([sys.executable, "-m", "sorbrank.service.cli", *argv, "--help"],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    return out.stdout


def test_top_level_help_lists_every_command():
    text = _help()
    for name in COMMANDS:
        assert f"    {name}" in text, name


@pytest.mark.parametrize("name", COMMANDS)
def test_each_command_help_teaches(name):
    text = _help(name)
    assert f"sorbrank {name}" in text
    assert "example" in text.lower(), f"'sorbrank {name} --help' shows no example"


def test_models_command_lists_the_catalogue(capsys):
    args = build_parser().parse_args(["models", "--format", "json"])
    assert args.func(args) == 0
    listed = [m["id"] for m in json.loads(capsys.readouterr().out)]
    assert listed == list(CATALOGUE)


def test_fit_help_names_every_unit_intake_reads():
    from sorbrank.worker.units import LOADING_UNITS, PRESSURE_UNITS

    text = _help("fit")
    for option in ("--units", "--pressure-unit", "--loading-unit", "--sample-mass-g",
                   "--delimiter", "--decimal", "--gas"):
        assert option in text
    missing = [unit for unit in [*PRESSURE_UNITS, *LOADING_UNITS] if unit not in text]
    assert not missing, f"'sorbrank fit --help' does not name {missing}"


def test_a_command_loads_only_its_own_module():
    probe = ("import sys\n"
             "from sorbrank.service.cli import build_parser\n"
             "build_parser(['models'])\n"
             "print(sorted(m for m in sys.modules if m.startswith('sorbrank.service.commands.')))\n")
    run = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr
    assert run.stdout.strip() == "['sorbrank.service.commands.models']"


def test_submit_reads_units_as_fit_does():
    """submit takes the same units declaration as fit (one reading of the three options)."""
    text = _help("submit")
    for option in ("--units", "--pressure-unit", "--loading-unit", "--sample-mass-g"):
        assert option in text
    done = subprocess.run([sys.executable, "-m", "sorbrank.service.cli", "submit", "x.csv",
                           "--units", "pressure:kPa", "--pressure-unit", "bar"],
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 2 and "given twice" in done.stderr
