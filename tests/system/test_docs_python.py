"""Every ```python block of docs/python.md runs, in order, in one namespace,
as a notebook would run its cells. Blocks whose first line is the comment
``# needs a server`` run against a real ``sorbrank serve`` (embedded mode,
a subprocess on a free port) that $SORBRANK_URL points at."""
from __future__ import annotations

import ast
import contextlib
import io
import re

import pytest

from conftest import ROOT, clean_env, start_server

DOC = ROOT / "docs" / "python.md"
SERVER_MARK = "# needs a server"
BLOCK = re.compile(r"^```python\n(.*?)^```", re.S | re.M)


def python_blocks() -> list[tuple[int, str]]:
    """(line number, code) of every ```python block of the page."""
    text = DOC.read_text()
    return [(text.count("\n", 0, m.start()) + 2, m.group(1)) for m in BLOCK.finditer(text)]


def run_cell(code: str, namespace: dict, where: str):
    """Run ``code``; like a notebook, return the value of a last bare expression."""
    tree = ast.parse(code, filename=where)
    last = tree.body.pop() if tree.body and isinstance(tree.body[-1], ast.Expr) else None
    exec(compile(tree, where, "exec"), namespace)
    if last is not None:
        return eval(compile(ast.Expression(last.value), where, "eval"), namespace)
    return None


@pytest.fixture
def server(tmp_path, monkeypatch):
    env = clean_env(SORBRANK_DATA_DIR=str(tmp_path / "data"), SORBRANK_EMBEDDED_WORKERS="1",
                    PYTHONPATH=str(ROOT))
    procs = []
    try:
        _, url = start_server(env, tmp_path / "logs", procs)
        monkeypatch.setenv("SORBRANK_URL", url)
        monkeypatch.delenv("SORBRANK_TOKEN", raising=False)
        yield url
    finally:
        for proc in procs:
            proc.stop()


def test_the_page_has_local_and_server_examples():
    blocks = python_blocks()
    assert len(blocks) >= 8
    assert sum(code.startswith(SERVER_MARK) for _, code in blocks) >= 3


@pytest.mark.integration
def test_every_example_runs_in_order(server, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # the examples write their files here
    namespace: dict = {"__name__": "__docs__"}
    shown = io.StringIO()
    for line, code in python_blocks():
        where = f"docs/python.md, block at line {line}"
        with contextlib.redirect_stdout(shown):
            value = run_cell(code, namespace, where)
        if hasattr(value, "_repr_html_"):  # what a notebook would display
            assert value._repr_html_(), where
    printed = shown.getvalue()

    # what the page says the examples show
    assert "True" in printed.splitlines()  # plain columns + units: the same numbers
    assert namespace["results"].n_isotherms == 4
    assert namespace["checked"].n_isotherms == 3
    assert any(i["code"] == "not_a_number" for i in namespace["checked"].rejected)
    assert "criterion" in printed
    assert namespace["declared_gas"].rejected == [] and namespace["declared_gas"].n_isotherms == 1
    assert "no sorbrank service answers at http://127.0.0.1:9" in printed
    assert (tmp_path / "TG31-0001-CO2-298K.svg").stat().st_size > 0
    assert namespace["batch"].status()["state"] == "done"
    assert list(namespace["ranked"].sorbent_id) == ["TG31-0001", "TG31-0002"]
    local = namespace["results"].summary.sort_values("isotherm_id")
    remote = namespace["remote"].sort_values("isotherm_id")
    assert remote.q_sat_mol_per_kg.tolist() == pytest.approx(local.q_sat_mol_per_kg.tolist(),
                                                             rel=1e-12)
