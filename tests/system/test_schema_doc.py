"""docs/schema.md is generated from the declared schema
(``python -m sorbrank.worker.store.schemadoc --out docs/schema.md``); this
fails when the file is not what the code generates now, e.g. after a column
or a model parameter was added without regenerating it."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

from conftest import clean_env

from sorbrank.worker.store.schema import declared, schemas
from sorbrank.worker.store.schemadoc import markdown

ROOT = Path(__file__).resolve().parents[2]
DOC = ROOT / "docs" / "schema.md"
COMMAND = "python -m sorbrank.worker.store.schemadoc --out docs/schema.md"


def test_docs_schema_md_is_current():
    assert DOC.read_text() == markdown(), f"docs/schema.md is stale: run {COMMAND}"


def test_every_declared_column_has_its_row_with_type_and_unit():
    text = DOC.read_text()
    for table in schemas():
        section = text.split(f"\n## {table}\n", 1)[1].split("\n## ", 1)[0]
        for fld in declared(table):
            unit = fld.metadata[b"unit"].decode()
            assert f"| `{fld.name}` | " in section and f" | {unit} | " in section, (table, fld.name)
    # the PostgreSQL definitions are there, not the placeholder
    assert 'CREATE TABLE "summaries"' in text and "HOOK" not in text


def test_the_check_mode_fails_on_a_stale_file(tmp_path):
    stale = tmp_path / "schema.md"
    stale.write_text(markdown().replace("| `quality_flags` |", "| `flags` |"))
    env = clean_env(PYTHONPATH=str(ROOT))
    run = [sys.executable, "-m", "sorbrank.worker.store.schemadoc", "--out", str(stale)]
    done = subprocess.run(run + ["--check"], env=env, capture_output=True, text=True, timeout=120)
    assert done.returncode == 1 and "not current" in done.stderr
    assert subprocess.run(run, env=env, timeout=120).returncode == 0
    done = subprocess.run(run + ["--check"], env=env, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert stale.read_text() == markdown()
