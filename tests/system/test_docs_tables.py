"""Tables in docs/ that mirror constants of the code, checked against the code:
the configuration table (docs/operations.md), the flags table (docs/results.md),
the unit tokens of column names (docs/formats.md), the model catalogue
(docs/results.md) and the module tree of DEVELOPERS.md ("Layout"). A table
that falls behind the code fails here, naming the row."""
from __future__ import annotations

import ast
import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from sorbrank.service.client import DEFAULT_URL
from sorbrank.service.config import load_settings
from sorbrank.worker.intake import Limits
from sorbrank.worker.models import CATALOGUE
from sorbrank.worker.store import index as read_index
from sorbrank.worker.units import COLUMN_TOKENS

ROOT = Path(__file__).resolve().parents[2]
DOCS = ROOT / "docs"


def section(path: Path, heading: str) -> str:
    """The text under ``## heading`` (or ``### heading``) up to the next heading
    of the same or a higher level."""
    text = path.read_text()
    match = re.search(rf"^(#+) {re.escape(heading)}\n", text, flags=re.M)
    assert match, f"{path.name} has no section {heading!r}"
    level = len(match.group(1))
    # a "# comment" line inside a fenced code block is no heading
    fences = [m.span() for m in re.finditer(r"^```.*?^```", text, flags=re.M | re.S)]
    for end in re.finditer(rf"^#{{1,{level}}} ", text[match.end():], flags=re.M):
        at = match.end() + end.start()
        if not any(lo <= at < hi for lo, hi in fences):
            return text[match.end(): at]
    return text[match.end():]


def table_rows(text: str) -> list[list[str]]:
    """The body rows of every markdown table in ``text``, as lists of cells."""
    rows = []
    for line in text.splitlines():
        if not line.startswith("|") or re.fullmatch(r"\|[-| ]+\|", line):
            continue
        cells = [c.strip() for c in re.split(r"(?<!\\)\|", line.strip())[1:-1]]
        rows.append(cells)
    # drop each table's header row (the one followed by the |---| line)
    lines = text.splitlines()
    headers = {tuple(c.strip() for c in re.split(r"(?<!\\)\|", lines[i - 1].strip())[1:-1])
               for i, line in enumerate(lines) if re.fullmatch(r"\|[-| ]+\|", line)}
    return [r for r in rows if tuple(r) not in headers]


def code_names(cell: str) -> list[str]:
    return re.findall(r"`([^`]+)`", cell)


# -- configuration ----------------------------------------------------------------

def variables_read_by_the_code() -> set[str]:
    code = "\n".join(p.read_text() for folder in ("service", "worker", "sorbrank")
                     for p in (ROOT / folder).rglob("*.py"))
    return set(re.findall(r"\b(SORBRANK_[A-Z0-9_]*[A-Z0-9])\b", code))


def configuration_table() -> dict[str, str]:
    rows = table_rows(section(DOCS / "operations.md", "Configuration"))
    table = {}
    for cells in rows:
        names = code_names(cells[0])
        assert len(names) == 1, f"one variable per row: {cells[0]}"
        table[names[0]] = cells[-1].strip("`")
    return table


def documented_value(text: str):
    """A default as the table writes it: a number, `N MiB`, octal `0640`,
    `cores`, `unset`/`off`, or a literal."""
    if text in ("unset", "off"):
        return None
    if text == "cores":
        return os.cpu_count() or 1
    if m := re.fullmatch(r"(\d+) MiB", text):
        return int(m.group(1)) * 1024 * 1024
    if re.fullmatch(r"0[0-7]{3}", text):
        return int(text, 8)
    if re.fullmatch(r"\d+", text):
        return int(text)
    return text


def actual_defaults() -> dict[str, object]:
    """Every variable's value when the environment sets nothing, read from the
    code's own parsers and constants."""
    settings = load_settings({})
    out: dict[str, object] = {}
    for field in settings.__dataclass_fields__:
        out["SORBRANK_" + field.upper()] = getattr(settings, field)
    out["SORBRANK_DATA_DIR"] = str(settings.data_dir)
    out["SORBRANK_ALLOW_OPEN"] = int(settings.allow_open)
    limits = Limits()
    out["SORBRANK_MAX_ISOTHERMS"] = limits.max_isotherms
    out["SORBRANK_MAX_POINTS_PER_ISOTHERM"] = limits.max_points_per_isotherm
    out["SORBRANK_TOKENS"] = out["SORBRANK_TOKENS_FILE"] = None if not settings.tokens else "set"
    out["SORBRANK_URL"] = DEFAULT_URL
    out["SORBRANK_TOKEN"] = None  # the client sends no token unless given one
    out["SORBRANK_READ_INDEX"] = int(read_index.enabled())
    return out


def test_configuration_table_lists_every_variable_the_code_reads():
    used, listed = variables_read_by_the_code(), set(configuration_table())
    assert used - listed == set(), "read by the code, missing from docs/operations.md"
    assert listed - used == set(), "in docs/operations.md, read by nothing"


def test_configuration_table_states_each_default_the_code_uses(monkeypatch):
    for name in variables_read_by_the_code():
        monkeypatch.delenv(name, raising=False)
    actual = actual_defaults()
    wrong = {}
    for name, text in configuration_table().items():
        value = documented_value(text)
        if name == "SORBRANK_DATA_DIR":
            value = str(Path(value))
        assert name in actual, f"{name}: no known default in the code to compare with"
        if value != actual[name]:
            wrong[name] = (text, actual[name])
    assert not wrong, f"documented default vs the code's: {wrong}"


def test_the_default_parser_refuses_what_it_cannot_read():
    # the check above is only as good as documented_value: it must not turn
    # every cell into a match
    assert documented_value("64 MiB") == 64 * 1024 * 1024
    assert documented_value("0640") == 0o640
    assert documented_value("2000") == 2000
    assert documented_value("unset") is None
    assert documented_value("./data") == "./data"


# -- flags ------------------------------------------------------------------------

FLAG_NAME = re.compile(r"[a-z][a-z0-9_<>]*")


# module-level string constants of worker/ (``INTERNAL_ERROR = "internal_error"``), so
# ``add_flag(flags, rows, INTERNAL_ERROR)`` is seen too
_CONSTANTS: dict[str, str] = {}


def _flag_text(node: ast.AST) -> str | None:
    """A flag name given as a literal, or an f-string with each field as ``<…>``."""
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return node.value
    if isinstance(node, ast.JoinedStr):
        return "".join(v.value if isinstance(v, ast.Constant) else "<>" for v in node.values)
    return None


class _FlagSites(ast.NodeVisitor):
    """Flag names at the places the code gives an isotherm or a row a flag:
    ``add_flag(flags, where, NAME)``; ``<…flags…>.append(NAME)`` (also in a
    method named ``flags``); string literals in the value of an assignment to,
    or the iterable of a loop over, a name containing ``flag``; and lists of
    string literals passed along as a row's flags (``[... , ["iast_x"]]``)."""

    def __init__(self) -> None:
        self.names: set[str] = set()
        self.function: list[str] = []

    def _add(self, node: ast.AST) -> None:
        text = _flag_text(node)
        if text is not None and text != "flags" and FLAG_NAME.fullmatch(text):
            self.names.add(text)

    def visit_FunctionDef(self, node: ast.FunctionDef) -> None:
        self.function.append(node.name)
        self.generic_visit(node)
        self.function.pop()

    def visit_Call(self, node: ast.Call) -> None:
        func = node.func
        if isinstance(func, ast.Name) and func.id == "add_flag" and len(node.args) >= 3:
            name = node.args[2]
            if isinstance(name, ast.Name) and name.id in _CONSTANTS:
                name = ast.Constant(_CONSTANTS[name.id])
            self._add(name)
        if isinstance(func, ast.Attribute) and func.attr in ("append", "add"):
            receiver = ast.unparse(func.value)
            in_flags = "flag" in receiver or any("flag" in f for f in self.function[-1:])
            for arg in node.args:
                if in_flags:
                    self._add(arg)
                # a list of literals carried inside a tuple: a row's flags to be
                for sub in ast.walk(arg):
                    if isinstance(sub, ast.List) and sub.elts and all(
                            _flag_text(e) is not None for e in sub.elts) and sub is not arg:
                        for e in sub.elts:
                            self._add(e)
        self.generic_visit(node)

    def _targets_flag(self, targets) -> bool:
        return any("flag" in n.id for t in targets for n in ast.walk(t) if isinstance(n, ast.Name))

    def visit_Assign(self, node: ast.Assign) -> None:
        if self._targets_flag(node.targets):
            for sub in ast.walk(node.value):
                if isinstance(sub, ast.Tuple):
                    for e in sub.elts:
                        self._add(e)
        self.generic_visit(node)

    def visit_For(self, node: ast.For) -> None:
        if self._targets_flag([node.target]):
            for sub in ast.walk(node.iter):
                if isinstance(sub, ast.Tuple):
                    for e in sub.elts:
                        self._add(e)
        self.generic_visit(node)


def flags_the_code_raises() -> set[str]:
    trees = [ast.parse(path.read_text(), filename=str(path))
             for path in (ROOT / "worker").rglob("*.py")]
    for tree in trees:
        for node in tree.body:
            if (isinstance(node, ast.Assign) and len(node.targets) == 1
                    and isinstance(node.targets[0], ast.Name) and node.targets[0].id.isupper()
                    and isinstance(node.value, ast.Constant) and isinstance(node.value.value, str)):
                _CONSTANTS[node.targets[0].id] = node.value.value
    sites = _FlagSites()
    for tree in trees:
        sites.visit(tree)
    return sites.names


def documented_flags() -> set[str]:
    names = set()
    for cells in table_rows(section(DOCS / "results.md", "Flags")):
        names.update(re.sub(r"<[^>]*>", "<>", n) for n in code_names(cells[0]))
    return names


def test_every_flag_the_code_raises_is_documented():
    raised = flags_the_code_raises()
    # the scan must see each way of raising a flag, or the check below is empty
    for known in ("no_saturation_capacity", "non_monotonic_loading", "ambiguous_model",
                  "qst_inversion_failed", "iast_invalid_request",
                  "extrapolated_loading_at_<>_pa"):
        assert known in raised, f"the flag scan missed {known}"
    missing = raised - documented_flags()
    assert not missing, f"raised by worker/, missing from docs/results.md 'Flags': {missing}"


def test_no_documented_flag_is_unknown_to_the_code():
    unknown = documented_flags() - flags_the_code_raises()
    assert not unknown, (f"in docs/results.md 'Flags', but raised nowhere in worker/ (or raised "
                         f"in a way _FlagSites does not see yet: teach it): {unknown}")


# -- unit tokens ------------------------------------------------------------------

def test_unit_token_table_is_the_column_token_table():
    """Pressure tokens in the first pair of columns, loading tokens in the
    second, each beside the unit it means."""
    rows = table_rows(section(DOCS / "formats.md", "Unit tokens in column names"))
    documented: dict[str, dict[str, str]] = {"pressure": {}, "loading": {}}
    for cells in rows:
        for kind, (token_cell, unit_cell) in zip(documented, (cells[0:2], cells[2:4])):
            for token in code_names(token_cell):
                documented[kind][token] = unit_cell
    for kind, tokens in COLUMN_TOKENS.items():
        assert set(documented[kind]) == set(tokens), (
            f"{kind}: missing {set(tokens) - set(documented[kind])}, "
            f"unknown {set(documented[kind]) - set(tokens)}")
        wrong = {t: cell for t, cell in documented[kind].items()
                 if not re.match(re.escape(tokens[t]) + r"(?![\w/])", cell)}
        assert not wrong, f"{kind}: documented unit is not the code's for {wrong}"


# -- model catalogue --------------------------------------------------------------

def test_model_table_is_the_catalogue_in_its_order():
    rows = table_rows(section(DOCS / "results.md", "Models and selection"))
    documented = [code_names(cells[0])[0] for cells in rows]
    assert documented == list(CATALOGUE)
    for cells in rows:
        model = CATALOGUE[code_names(cells[0])[0]]
        assert (cells[1].startswith("yes")) == bool(model.relative_pressure), cells
        # an opt-in model changes no default selection only if users are told
        assert cells[2].startswith("yes") == model.in_default_catalogue, cells


@pytest.mark.parametrize("page", sorted(p.name for p in DOCS.glob("*.md")) + ["README.md"])
def test_relative_links_between_pages_resolve(page):
    path = ROOT / page if page == "README.md" else DOCS / page
    for target in re.findall(r"\]\(([^)#:]+)(?:#[^)]*)?\)", path.read_text()):
        assert (path.parent / target).exists(), f"{page} links to {target}, which does not exist"


# -- the contributor guide's layout tree ------------------------------------------

TREE_GLYPHS = re.compile(r"^((?:│   |    )*)(?:├── |└── )?(\S+)")


def layout_tree() -> list[str]:
    """The paths of DEVELOPERS.md's layout tree (``### Layout``, its ``text``
    block): four columns of indent per level, directories ending in ``/``."""
    text = section(ROOT / "DEVELOPERS.md", "Layout")
    block = re.search(r"^```text\n(.*?)^```", text, flags=re.M | re.S)
    assert block, "DEVELOPERS.md 'Layout' has no ```text block"
    paths: list[str] = []
    parents: list[str] = []
    for line in block.group(1).splitlines():
        match = TREE_GLYPHS.match(line)
        assert match, f"not a tree line: {line!r}"
        depth = len(match.group(1)) // 4 + (1 if line[len(match.group(1)):][:1] in "├└" else 0)
        name = match.group(2)
        assert depth <= len(parents), f"{name}: indented below no directory"
        parents = parents[:depth]
        path = "".join(parents) + name
        paths.append(path)
        if name.endswith("/"):
            parents.append(name)
    return paths


def tracked_modules() -> set[str]:
    """Every .py under sorbrank/, service/ and worker/ that git tracks (the files
    on disk where this is no git checkout, e.g. an unpacked source archive)."""
    folders = ("sorbrank", "service", "worker")
    listed = subprocess.run(["git", "-C", str(ROOT), "ls-files", "--", *(f"{f}/*.py" for f in folders)],
                            capture_output=True, text=True) if shutil.which("git") else None
    if listed is not None and listed.returncode == 0:
        return set(listed.stdout.split())
    return {p.relative_to(ROOT).as_posix() for f in folders for p in (ROOT / f).rglob("*.py")
            if "__pycache__" not in p.parts}


def test_the_layout_tree_lists_every_module_and_nothing_else():
    paths = layout_tree()
    assert len(paths) == len(set(paths)), "an entry is listed twice"
    missing = tracked_modules() - {p for p in paths if p.endswith(".py")}
    assert not missing, f"modules missing from DEVELOPERS.md 'Layout': {sorted(missing)}"
    gone = [p for p in paths if not (ROOT / p).exists()
            or (ROOT / p).is_dir() != p.endswith("/")]
    assert not gone, f"in DEVELOPERS.md 'Layout', not in the repository: {gone}"


def test_the_tree_parser_reads_nesting():
    # the check above is only as good as layout_tree: nesting must give full paths
    paths = layout_tree()
    assert "worker/engine/lm.py" in paths and "service/api/batches.py" in paths
    assert "worker/models/" in paths and "sorbrank/study.py" in paths


# -- the contributor guide's worked add-a-model example ---------------------------

def test_the_add_a_model_example_is_the_code_it_shows():
    """The guide's Jovanovic example shows the real class file, its registration
    line and its case row; each block must still be in the file it names."""
    text = section(ROOT / "DEVELOPERS.md", "Adding a model")
    blocks = re.findall(r"^```python\n(.*?)^```", text, flags=re.M | re.S)
    assert len(blocks) == 4, "class, registration, equation, case row"
    model_file = (ROOT / "worker/models/jovanovic.py").read_text()
    assert blocks[0] == model_file, "DEVELOPERS.md shows another jovanovic.py than the file"
    assert blocks[1] in (ROOT / "worker/models/__init__.py").read_text()
    cases = (ROOT / "tests/model_cases.py").read_text()
    assert blocks[2] in cases and blocks[3] in cases
