#!/usr/bin/env bash
# The whole test suite from a fresh clone: venv, dependencies, services, pytest.
# Usage: bash tests/run.sh [pytest args...]
set -euo pipefail
cd "$(dirname "$0")/.."

PY="${PYTHON:-python3}"
if [ ! -x .venv/bin/python ]; then
    "$PY" -m venv .venv
fi
.venv/bin/python -m pip install -q --disable-pip-version-check --upgrade pip >/dev/null
.venv/bin/python -m pip install -q --disable-pip-version-check -e '.[test]'
# the build backend pyproject.toml names, in the venv itself: tests/system/test_packaging.py
# builds the wheel with it, without build isolation (no download at test time)
.venv/bin/python -m pip install -q --disable-pip-version-check 'setuptools>=77' wheel

# System programs the integration tests start themselves (on free loopback
# ports): redis-server; and Chromium + ChromeDriver for the page test. Installed from Debian's packages when missing.
need_apt=()
command -v redis-server >/dev/null 2>&1 || need_apt+=(redis-server)
# headless browser for the overview-page test (Debian's build; nothing downloads its own)
command -v chromium >/dev/null 2>&1 || need_apt+=(chromium)
command -v chromedriver >/dev/null 2>&1 || need_apt+=(chromium-driver)
# PostgreSQL server programs for the load test (it runs its own initdb on a free port)
compgen -G '/usr/lib/postgresql/*/bin/initdb' >/dev/null || need_apt+=(postgresql)
# where a docker client exists, a compose implementation lets the deploy test
# parse docker/compose.yaml (no engine is needed for that)
if command -v docker >/dev/null 2>&1 && ! docker compose version >/dev/null 2>&1 \
        && ! command -v docker-compose >/dev/null 2>&1; then
    need_apt+=(docker-compose)
fi
if [ "${#need_apt[@]}" -gt 0 ]; then
    if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then
        echo "installing ${need_apt[*]} from Debian's packages" >&2
        apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "${need_apt[@]}" >/dev/null
    else
        echo "missing ${need_apt[*]}: install it (apt-get install ${need_apt[*]}) and re-run" >&2
        exit 1
    fi
fi

# the linter first (pyproject.toml [tool.ruff]): seconds, and it fails fast
.venv/bin/ruff check .
.venv/bin/mypy  # pyproject.toml [tool.mypy]: the worker package
exec .venv/bin/python -m pytest "$@"
