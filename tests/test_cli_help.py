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
