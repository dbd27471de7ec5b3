"""The wheel installs one import name, ``sorbrank``, holding exactly the source
tree (service/ -> sorbrank/service, worker/ -> sorbrank/worker, sorbrank/),
and works from a folder that has its own ``worker.py`` and ``service.py``.

The wheel is built from a copy of the working tree (so the build leaves no
build/ or egg-info in the repository) with the project venv's setuptools, no
network; it is installed into a plain venv whose only way to the dependencies
is a .pth line naming the project venv's site-packages (a directory named in a
.pth is put on sys.path but its own .pth files are not run, so the project's
editable install of sorbrank stays invisible there).
"""
from __future__ import annotations

import shutil
import site
import subprocess
import sys
import tomllib
import zipfile
from pathlib import Path

import pytest

from conftest import ROOT, clean_env

SOURCE_FOLDERS = {"sorbrank": "sorbrank", "service": "sorbrank/service", "worker": "sorbrank/worker"}
SKIPPED_PARTS = {"__pycache__"}


def source_files() -> dict[str, Path]:
    """Wheel path -> source file, for every file the package folders hold."""
    out = {}
    for folder, target in SOURCE_FOLDERS.items():
        for path in (ROOT / folder).rglob("*"):
            relative = path.relative_to(ROOT / folder)
            if path.is_file() and not SKIPPED_PARTS & set(relative.parts) \
                    and path.suffix not in (".pyc", ".pyo"):
                out[f"{target}/{relative.as_posix()}"] = path
    return out


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    base = tmp_path_factory.mktemp("wheel")
    tree = base / "src"
    shutil.copytree(ROOT, tree, ignore=shutil.ignore_patterns(
        ".venv", ".git", "__pycache__", "*.egg-info", "build", "dist", ".ruff_cache",
        ".hypothesis", "test-artifacts", ".pytest_cache"))
    done = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
                           "--no-index", "--disable-pip-version-check", "-w", str(base / "dist"),
                           str(tree)], capture_output=True, text=True, timeout=300,
                          env=clean_env())
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    # a data folder that looks like an unlisted package makes setuptools warn
    assert "is absent from the `packages` configuration" not in done.stdout + done.stderr
    (found,) = (base / "dist").glob("sorbrank-*.whl")
    return found


def test_the_wheel_holds_one_import_name_and_exactly_the_source_tree(wheel):
    names = [n for n in zipfile.ZipFile(wheel).namelist() if not n.endswith("/")]
    tops = {n.split("/")[0] for n in names}
    (dist_info,) = [t for t in tops if t.endswith(".dist-info")]
    assert tops == {"sorbrank", dist_info}
    top_level = zipfile.ZipFile(wheel).read(f"{dist_info}/top_level.txt").decode().split()
    assert top_level == ["sorbrank"]
    in_wheel = {n for n in names if n.startswith("sorbrank/")}
    expected = source_files()
    assert sorted(set(expected) - in_wheel) == [], "source files missing from the wheel"
    assert sorted(in_wheel - set(expected)) == [], "wheel files that are not in the source tree"
    # page templates and styles are among them (package data, not only .py files)
    assert any(n.startswith("sorbrank/service/web/templates/") for n in in_wheel)
    assert any(n.startswith("sorbrank/service/web/static/") for n in in_wheel)
    for name in ("sorbrank/service/cli.py", "sorbrank/worker/engine/lm.py", "sorbrank/__init__.py"):
        assert zipfile.ZipFile(wheel).read(name) == expected[name].read_bytes()
    entry_points = zipfile.ZipFile(wheel).read(f"{dist_info}/entry_points.txt").decode()
    assert "sorbrank = sorbrank.service.cli:main" in entry_points


def test_the_package_list_names_every_package_folder():
    setuptools = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    listed = set(setuptools["packages"])
    folders = set()
    for folder, target in SOURCE_FOLDERS.items():
        for init in (ROOT / folder).rglob("*.py"):
            if SKIPPED_PARTS & set(init.parts):
                continue
            relative = init.parent.relative_to(ROOT / folder)
            folders.add(".".join([*target.split("/"), *relative.parts]))
    assert sorted(folders - listed) == [], "folders with Python files missing from packages"
    assert sorted(listed - folders) == [], "listed packages without a folder"
    for package in listed:  # each one a regular package, not an accidental namespace
        source = setuptools["package-dir"][package] if package in setuptools["package-dir"] else None
        if source is None:
            parent = max((p for p in setuptools["package-dir"] if package.startswith(p + ".")),
                         key=len)
            source = "/".join([setuptools["package-dir"][parent],
                               *package[len(parent) + 1:].split(".")])
        assert (ROOT / source / "__init__.py").is_file(), package


# a folder of a notebook user: modules named like the repository's folders,
# which must never be what ``import sorbrank...`` reaches
HOSTILE = {"worker.py": "raise ImportError('the user folder worker.py was imported')\n",
           "service.py": "raise ImportError('the user folder service.py was imported')\n"}

IMPORT_EVERYTHING = """
import importlib, json, pathlib, sys
import sorbrank, sorbrank.service.cli, sorbrank.worker.engine
root = pathlib.Path(sorbrank.__file__).parent
names = sorted(".".join(("sorbrank",) + p.relative_to(root).with_suffix("").parts)
               .removesuffix(".__init__") for p in root.rglob("*.py"))
for name in names:
    importlib.import_module(name)
print(json.dumps({"sorbrank": sorbrank.__file__, "modules": names,
                  "bare": [m for m in ("worker", "service") if m in sys.modules
                           and getattr(sys.modules[m], "__file__", "") and
                           not sys.modules[m].__file__.startswith(str(pathlib.Path.cwd()))]}))
"""


@pytest.fixture(scope="module")
def fresh_venv(tmp_path_factory, wheel) -> Path:
    venv = tmp_path_factory.mktemp("venv") / "v"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True,
                   timeout=120)
    python = venv / "bin" / "python"
    done = subprocess.run([sys.executable, "-m", "pip", "--python", str(python), "install",
                           "--no-deps", "--no-index", "--disable-pip-version-check", str(wheel)],
                          capture_output=True, text=True, timeout=300, env=clean_env())
    assert done.returncode == 0, done.stdout[-2000:] + done.stderr[-2000:]
    own = subprocess.run([str(python), "-c", "import sysconfig; print(sysconfig.get_path('purelib'))"],
                         capture_output=True, text=True, check=True).stdout.strip()
    # the dependencies (numpy, pyarrow, flask, ...) from the project venv, after its own
    (Path(own) / "project_dependencies.pth").write_text(
        "\n".join(site.getsitepackages()) + "\n")
    return venv


def test_the_installed_wheel_imports_from_a_folder_with_its_own_worker_and_service(
        fresh_venv, tmp_path):
    import json

    for name, text in HOSTILE.items():
        (tmp_path / name).write_text(text)
    env = clean_env(SORBRANK_DATA_DIR=str(tmp_path / "store"),
                    # sorbrank.service.wsgi builds its app at import: distributed mode, open
                    SORBRANK_BROKER_URL="redis://127.0.0.1:1/0", SORBRANK_ALLOW_OPEN="1")
    env.pop("PYTHONPATH", None)
    done = subprocess.run([str(fresh_venv / "bin" / "python"), "-c", IMPORT_EVERYTHING],
                          cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-3000:]
    result = json.loads(done.stdout.strip().splitlines()[-1])
    assert result["sorbrank"].startswith(str(fresh_venv)), result["sorbrank"]
    # every module of the source tree is importable as installed
    assert len(result["modules"]) == sum(1 for n in source_files() if n.endswith(".py"))
    assert result["bare"] == []
    # the console script, too
    done = subprocess.run([str(fresh_venv / "bin" / "sorbrank"), "--help"], cwd=tmp_path,
                          env=env, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0 and "migrate-store" in done.stdout, done.stderr[-2000:]


def test_the_hostile_folder_does_break_bare_imports(tmp_path):
    """The control: from that folder, a bare ``import worker`` gets the user's file."""
    for name, text in HOSTILE.items():
        (tmp_path / name).write_text(text)
    done = subprocess.run([sys.executable, "-c", "import worker"], cwd=tmp_path,
                          env=clean_env(), capture_output=True, text=True, timeout=60)
    assert done.returncode != 0 and "the user folder worker.py was imported" in done.stderr


# -- the linter refuses the repository's folder names as import names ----------

@pytest.mark.parametrize("line", ["import worker", "import service.cli",
                                  "from worker.store import Store", "from service import app"])
def test_ruff_refuses_bare_folder_imports(line):
    ruff = Path(sys.executable).with_name("ruff")
    source = f"{line}  # noqa: F401 - only the import is under test\n"
    done = subprocess.run([str(ruff), "check", "--no-cache", "--stdin-filename",
                           "tests/lint_probe.py", "-"], input=source, cwd=ROOT,
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 1 and "TID251" in done.stdout, done.stdout + done.stderr
    fine = source.replace("worker", "sorbrank.worker").replace("service", "sorbrank.service")
    done = subprocess.run([str(ruff), "check", "--no-cache", "--stdin-filename",
                           "tests/lint_probe.py", "-"], input=fine, cwd=ROOT,
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stdout + done.stderr


def test_ruff_flags_a_noqa_that_suppresses_nothing():
    ruff = Path(sys.executable).with_name("ruff")
    done = subprocess.run([str(ruff), "check", "--no-cache", "--stdin-filename",
                           "tests/lint_probe.py", "-"], input="x = 1  # noqa: BLE001\n",
                          cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert done.returncode == 1 and "RUF100" in done.stdout, done.stdout + done.stderr


FIT_A_DATAFRAME = """
import json
import pandas as pd
import sorbrank

# invented sorbents; Langmuir points q = 3 b p / (1 + b p), b = 0.05 /kPa (truth-known)
pressures_kpa = [1, 2, 5, 10, 20, 50, 100]
rows = [(sid, "CO2", 298.15, p, 3.0 * 0.05 * p / (1 + 0.05 * p) * scale)
        for sid, scale in (("TG31-W001", 1.0), ("TG31-W002", 1.5)) for p in pressures_kpa]
named = pd.DataFrame(rows, columns=["sorbent_id", "adsorbate", "temperature_k",
                                    "pressure_kpa", "loading_mmol_per_g"])
plain = named.rename(columns={"pressure_kpa": "pressure", "loading_mmol_per_g": "loading"})
out = {}
for key, frame, units in (("named", named, None),
                          ("plain", plain, {"pressure": "kPa", "loading": "mmol/g"})):
    summary = sorbrank.fit(frame, units=units, models=["langmuir"]).summary
    out[key] = {"type": type(summary).__name__, "rows": len(summary),
                "q_sat": summary["q_sat_mol_per_kg"].tolist()}
print(json.dumps(out))
"""


def test_the_installed_wheel_fits_a_dataframe(fresh_venv, tmp_path):
    """The acceptance line: from a fresh venv with pandas, ``sorbrank.fit(<DataFrame>).summary``
    is a DataFrame, one row per isotherm with q_sat, for unit-carrying and for plain columns
    with ``units=``; the shipped adsorbate table is found in the installed package."""
    import json

    for name, text in HOSTILE.items():
        (tmp_path / name).write_text(text)
    env = clean_env()
    env.pop("PYTHONPATH", None)
    done = subprocess.run([str(fresh_venv / "bin" / "python"), "-c", FIT_A_DATAFRAME],
                          cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-3000:]
    out = json.loads(done.stdout.strip().splitlines()[-1])
    for key in ("named", "plain"):
        assert out[key]["type"] == "DataFrame" and out[key]["rows"] == 2
        # exact Langmuir data: the fitted capacity is the truth
        assert out[key]["q_sat"] == pytest.approx([3.0, 4.5], rel=1e-6)
    assert out["named"]["q_sat"] == out["plain"]["q_sat"]
