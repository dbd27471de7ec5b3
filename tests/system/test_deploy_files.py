"""The container files (docker/Dockerfile, docker/compose.yaml) only run what
the package really provides.

Every command the image or the compose file runs (CMD, ENTRYPOINT,
HEALTHCHECK, compose ``command`` and healthcheck ``test``) is extracted and
checked against the package: ``sorbrank`` subcommands parse with the real
parser, gunicorn targets load through gunicorn's own loader and answer as WSGI
apps, ``python -c`` snippets compile and every module they import exists in
the installed package; the HTTP and Celery health checks are run against a
real gunicorn, redis-server and Celery worker. Commands run from a directory
outside the source tree with no PYTHONPATH, as in the image, so a target named
by a folder of the repository (``worker.celery_app`` instead of
``sorbrank.worker.celery_app``) fails here as it would there. No container engine
is needed; ``docker compose config`` runs only when a compose client exists.
"""
from __future__ import annotations

import json
import os
import re
import shlex
import shutil
import subprocess
import sys
import tomllib
from ast import Import, ImportFrom, parse, walk
from dataclasses import dataclass
from pathlib import Path

import pytest
import yaml

from conftest import (LOOPBACK, ROOT, clean_env, free_port, http_ok, start, start_redis,
                      start_worker, tokens_json, wait_until)

DOCKERFILE = ROOT / "docker" / "Dockerfile"
# where the commands run: not the repository root, whose service/ and worker/
# folders would be importable by their bare names from there
AWAY = ROOT / "docker"
COMPOSE = ROOT / "docker" / "compose.yaml"
API_PORT = 8000

# -- Dockerfile -----------------------------------------------------------------


@dataclass(frozen=True)
class Instruction:
    stage: int  # index of the FROM it belongs to
    keyword: str  # upper case
    args: str
    line: int


def parse_dockerfile(text: str) -> list[Instruction]:
    """Logical instructions: comments dropped, backslash continuations joined."""
    out: list[Instruction] = []
    stage = -1
    buf: list[str] = []
    start_line = 0
    for number, raw in enumerate(text.splitlines(), 1):
        stripped = raw.strip()
        if not buf and not stripped:
            continue
        if stripped.startswith("#"):  # comments (and parser directives), also inside continuations
            continue
        if not buf:
            start_line = number
        if stripped.endswith("\\"):
            buf.append(stripped[:-1].strip())
            continue
        buf.append(stripped)
        logical = " ".join(part for part in buf if part)
        buf = []
        keyword, _, args = logical.partition(" ")
        keyword = keyword.upper()
        if keyword == "FROM":
            stage += 1
        out.append(Instruction(stage, keyword, args.strip(), start_line))
    assert not buf, "Dockerfile ends inside a line continuation"
    return out


def exec_or_shell(args: str) -> list[str]:
    """argv of an exec-form (JSON array) or shell-form instruction argument."""
    if args.startswith("["):
        argv = json.loads(args)
        assert isinstance(argv, list) and all(isinstance(a, str) for a in argv), args
        return argv
    return ["/bin/sh", "-c", args]


def healthcheck_argv(args: str) -> list[str] | None:
    """The command of ``HEALTHCHECK [--opt=v ...] CMD ...`` (None for NONE)."""
    rest = args
    while rest.startswith("--"):
        _, _, rest = rest.partition(" ")
        rest = rest.lstrip()
    if rest.upper() == "NONE":
        return None
    keyword, _, command = rest.partition(" ")
    assert keyword.upper() == "CMD", f"HEALTHCHECK without CMD: {args!r}"
    return exec_or_shell(command.strip())


def final_stage(instructions: list[Instruction]) -> list[Instruction]:
    last = max(i.stage for i in instructions)
    return [i for i in instructions if i.stage == last]


def dockerfile_commands(instructions: list[Instruction]) -> dict[str, list[str]]:
    """Commands the final image runs: CMD, ENTRYPOINT, HEALTHCHECK (last of each wins)."""
    found: dict[str, list[str]] = {}
    for ins in final_stage(instructions):
        if ins.keyword in ("CMD", "ENTRYPOINT"):
            found[ins.keyword] = exec_or_shell(ins.args)
        elif ins.keyword == "HEALTHCHECK":
            argv = healthcheck_argv(ins.args)
            if argv is None:
                found.pop("HEALTHCHECK", None)
            else:
                found["HEALTHCHECK"] = argv
    return found


def dockerfile_env(instructions: list[Instruction]) -> dict[str, str]:
    """ENV of the final stage (``KEY=value`` pairs, shell-style quoting)."""
    env: dict[str, str] = {}
    for ins in final_stage(instructions):
        if ins.keyword == "ENV":
            for pair in shlex.split(ins.args):
                key, sep, value = pair.partition("=")
                assert sep, f"line {ins.line}: use ENV KEY=value, got {pair!r}"
                env[key] = value
    return env


BUILD_TOOLS = re.compile(r"\b(gcc|g\+\+|clang|cc|make|cmake|build-essential|"
                         r"[\w.+-]+-dev|rustc|cargo|gfortran)\b")
INSTALLERS = re.compile(r"\b(apt-get|apt|apk|yum|dnf|microdnf)\b[^;&|]*\b(install|add)\b([^;&|]*)")


def final_stage_problems(instructions: list[Instruction]) -> list[str]:
    """Why the final stage is not a non-root, compiler-free runtime (empty = fine)."""
    problems = []
    stage = final_stage(instructions)
    users = [i for i in stage if i.keyword == "USER"]
    if not users:
        problems.append("final stage has no USER: it runs as root")
    else:
        user = users[-1].args.split(":")[0].strip()
        if user in ("root", "0", ""):
            problems.append(f"line {users[-1].line}: final USER is root ({users[-1].args!r})")
    for ins in stage:
        if ins.keyword != "RUN":
            continue
        for match in INSTALLERS.finditer(ins.args):
            tools = BUILD_TOOLS.findall(match.group(3))
            if tools:
                problems.append(f"line {ins.line}: final stage installs build tools {tools}")
    return problems


# -- compose ----------------------------------------------------------------------

_VAR = re.compile(r"\$\$|\$\{([A-Za-z_][A-Za-z0-9_]*)(?:(:?[-?])([^}]*))?\}|\$([A-Za-z_][A-Za-z0-9_]*)")


def interpolate(value, env: dict[str, str]):
    """Compose variable interpolation (``${X}``, ``${X:-d}``, ``${X-d}``, ``$$``)."""
    if isinstance(value, dict):
        return {k: interpolate(v, env) for k, v in value.items()}
    if isinstance(value, list):
        return [interpolate(v, env) for v in value]
    if not isinstance(value, str):
        return value

    def sub(m: re.Match) -> str:
        if m.group(0) == "$$":
            return "$"
        name = m.group(1) or m.group(4)
        op, default = m.group(2), m.group(3)
        if op == ":-":
            return env.get(name) or default
        if op == "-":
            return env.get(name, default)
        if op in (":?", "?"):
            if (op == ":?" and not env.get(name)) or name not in env:
                raise KeyError(f"required variable {name} is not set: {default}")
            return env[name]
        return env.get(name, "")

    return _VAR.sub(sub, value)


def load_compose(env: dict[str, str] | None = None) -> dict:
    return interpolate(yaml.safe_load(COMPOSE.read_text()), env or {})


def compose_argv(value) -> list[str]:
    """A compose ``command``: a list is exec form, a string goes through a shell."""
    if isinstance(value, list):
        return [str(v) for v in value]
    return ["/bin/sh", "-c", value]


def compose_test_argv(test) -> list[str] | None:
    if isinstance(test, str):
        return ["/bin/sh", "-c", test]
    kind, *rest = test
    if kind == "NONE":
        return None
    if kind == "CMD-SHELL":
        return ["/bin/sh", "-c", rest[0]]
    assert kind == "CMD", f"healthcheck test must start with CMD, CMD-SHELL or NONE: {test}"
    return rest


def uses_our_image(service: dict) -> bool:
    build = service.get("build")
    if isinstance(build, str):
        build = {"context": build}
    return bool(build) and build.get("dockerfile") == "docker/Dockerfile"


def compose_commands(compose: dict) -> dict[tuple[str, str], list[str]]:
    """(service, what) -> argv for every service built from docker/Dockerfile."""
    found = {}
    for name, service in compose["services"].items():
        if not uses_our_image(service):
            continue
        for key in ("command", "entrypoint"):
            if service.get(key) is not None:
                found[(name, key)] = compose_argv(service[key])
        test = (service.get("healthcheck") or {}).get("test")
        if test is not None and compose_test_argv(test) is not None:
            found[(name, "healthcheck")] = compose_test_argv(test)
    return found


# -- what a command may run ----------------------------------------------------------

def sorbrank_script_target() -> str:
    pyproject = tomllib.loads((ROOT / "pyproject.toml").read_text())
    return pyproject["project"]["scripts"]["sorbrank"]


def wsgi_env(data_dir: Path, broker_url: str = "redis://127.0.0.1:1/0") -> dict[str, str]:
    return clean_env(SORBRANK_DATA_DIR=str(data_dir), SORBRANK_BROKER_URL=broker_url,
                     SORBRANK_TOKENS=tokens_json())


LOAD_WSGI = """
import sys
from gunicorn.util import import_app
from werkzeug.test import EnvironBuilder
app = import_app(sys.argv[1])
status = []
body = b"".join(app(EnvironBuilder(path="/healthz").get_environ(),
                    lambda s, h, exc_info=None: status.append(s)))
print(status[0], body.decode())
"""


# which of the modules named in argv cannot be found (a missing parent counts)
FIND_MODULES = """
import importlib.util, json, sys

def missing(name):
    try:
        return importlib.util.find_spec(name) is None
    except ModuleNotFoundError:
        return True

print(json.dumps([m for m in sys.argv[1:] if missing(m)]))
"""


def command_problems(argv: list[str], data_dir: Path) -> list[str]:
    """Why ``argv`` does not run a real entry point of the package (empty = fine)."""
    if argv[:2] == ["/bin/sh", "-c"]:
        argv = shlex.split(argv[2])
    program, args = argv[0], argv[1:]
    if program == "sorbrank":
        if sorbrank_script_target() != "sorbrank.service.cli:main":
            return [f"console script sorbrank -> {sorbrank_script_target()}, not sorbrank.service.cli:main"]
        if not args:
            return ["'sorbrank' without a subcommand"]
        help_run = subprocess.run([sys.executable, "-m", "sorbrank.service.cli", args[0], "--help"],
                                  cwd=AWAY, env=clean_env(),
                                  capture_output=True, text=True, timeout=60)
        if help_run.returncode != 0:
            return [f"'sorbrank {args[0]} --help' exited {help_run.returncode}: "
                    f"{help_run.stderr.strip()[-500:]}"]
        from sorbrank.service.cli import build_parser

        try:
            build_parser().parse_args(args)
        except SystemExit as exc:
            return [f"sorbrank does not accept {args}: exit {exc.code}"]
        return []
    if program == "gunicorn":
        from gunicorn.config import Config

        try:
            parsed = Config().parser().parse_args(args)
        except SystemExit as exc:
            return [f"gunicorn does not accept {args}: exit {exc.code}"]
        if len(parsed.args) != 1:
            return [f"gunicorn needs exactly one module:attr target, got {parsed.args}"]
        run = subprocess.run([sys.executable, "-c", LOAD_WSGI, parsed.args[0]], cwd=AWAY,
                             env=wsgi_env(data_dir), capture_output=True, text=True, timeout=120)
        if run.returncode != 0 or not run.stdout.startswith("200"):
            return [f"gunicorn target {parsed.args[0]} did not answer GET /healthz with 200: "
                    f"{(run.stdout + run.stderr).strip()[-800:]}"]
        return []
    if program in ("python", "python3") and args[:1] == ["-c"] and len(args) >= 2:
        try:
            tree = parse(args[1], "<python -c>")
        except SyntaxError as exc:
            return [f"python -c snippet does not compile: {exc}"]
        modules = sorted({alias.name for node in walk(tree) if isinstance(node, Import)
                          for alias in node.names}
                         | {node.module for node in walk(tree)
                            if isinstance(node, ImportFrom) and node.level == 0})
        found = subprocess.run([sys.executable, "-c", FIND_MODULES, *modules], cwd=AWAY,
                               env=clean_env(), capture_output=True, text=True, timeout=60)
        missing = json.loads(found.stdout) if found.returncode == 0 else modules
        return [f"python -c snippet imports {m!r}, which the package does not provide"
                for m in missing]
    return [f"{program!r} is not an entry point of the package"]


# ===================================================================================
# the files as written


@pytest.fixture(scope="module")
def instructions():
    return parse_dockerfile(DOCKERFILE.read_text())


@pytest.fixture(scope="module")
def compose():
    return load_compose()


def test_dockerfile_is_multi_stage_wheels_only(instructions):
    froms = [i for i in instructions if i.keyword == "FROM"]
    assert len(froms) >= 2, "builder stage plus runtime stage"
    builder_runs = " ".join(i.args for i in instructions if i.stage == 0 and i.keyword == "RUN")
    assert re.search(r"\bpip wheel\b.*--wheel-dir[= ]/wheels\b.* \.(\s|$)", builder_runs), \
        "the builder makes wheels of the project and its dependencies"
    final = final_stage(instructions)
    assert final[0].args.split()[0] == "python:3.11-slim"
    installs = [i.args for i in final if i.keyword == "RUN" and "pip install" in i.args]
    assert len(installs) == 1 and "--no-index" in installs[0] and "/wheels" in installs[0], \
        "the final stage installs from the builder's wheels only"
    assert any(i.keyword == "WORKDIR" for i in final)


def test_builder_copies_every_source_folder_of_the_package(instructions):
    pyproject = tomllib.loads((ROOT / "pyproject.toml").read_text())
    folders = set(pyproject["tool"]["setuptools"]["package-dir"].values())
    copied = {src.rstrip("/") for i in instructions if i.stage == 0 and i.keyword == "COPY"
              for src in shlex.split(i.args)[:-1] if not src.startswith("--")}
    assert folders | {"pyproject.toml", "README.md"} <= copied, \
        f"the builder stage does not copy {sorted(folders - copied)}"


def test_final_stage_is_non_root_without_build_tools(instructions):
    assert final_stage_problems(instructions) == []


def test_store_volume_port_and_environment(instructions):
    final = final_stage(instructions)
    env = dockerfile_env(instructions)
    assert env["SORBRANK_DATA_DIR"] == "/data"
    volumes = [v for i in final if i.keyword == "VOLUME"
               for v in (json.loads(i.args) if i.args.startswith("[") else i.args.split())]
    assert "/data" in volumes
    assert [i.args for i in final if i.keyword == "EXPOSE"] == [str(API_PORT)]
    # every setting the image sets is one the service reads (catches typos)
    settings_source = "".join(p.read_text() for p in
                              (ROOT / "service" / "config.py", ROOT / "worker" / "settings.py",
                               ROOT / "worker" / "celery_app.py"))
    for key in env:
        if key.startswith("SORBRANK_"):
            assert key in settings_source, f"ENV {key} is read by nothing"


def test_gunicorn_cmd_args_in_image_env_parse(instructions):
    from gunicorn.config import Config

    extra = dockerfile_env(instructions).get("GUNICORN_CMD_ARGS")
    assert extra, "the image sets a request timeout for uploads"
    parsed = Config().parser().parse_args(shlex.split(extra))
    assert parsed.timeout >= 60


def test_default_command_is_gunicorn_on_the_exposed_port(instructions):
    commands = dockerfile_commands(instructions)
    assert "ENTRYPOINT" not in commands  # `docker run IMAGE sorbrank worker` must just work
    assert commands["CMD"] == ["gunicorn", "--bind", f"0.0.0.0:{API_PORT}", "--workers", "2",
                               "sorbrank.service.wsgi:app"]
    assert f"http://127.0.0.1:{API_PORT}/healthz" in commands["HEALTHCHECK"][-1]


def test_every_dockerfile_command_is_a_package_entry_point(instructions, tmp_path):
    commands = dockerfile_commands(instructions)
    assert {"CMD", "HEALTHCHECK"} <= commands.keys()
    for what, argv in commands.items():
        assert command_problems(argv, tmp_path / what) == [], f"{what}: {argv}"


def test_programs_the_image_runs_are_package_dependencies(instructions, compose):
    """The image holds only the wheels of sorbrank and its declared dependencies,
    so a program its commands start must be one of those (or python itself)."""
    pyproject = tomllib.loads((ROOT / "pyproject.toml").read_text())
    declared = {re.split(r"[\s<>=!~\[;]", dep, maxsplit=1)[0].lower().replace("_", "-")
                for dep in pyproject["project"]["dependencies"]}
    argvs = [*dockerfile_commands(instructions).values(), *compose_commands(compose).values()]
    programs = {argv[0] for argv in argvs}
    assert programs <= {"gunicorn", "sorbrank", "python"}, programs
    if "gunicorn" in programs:
        assert "gunicorn" in declared, "gunicorn runs the API: add it to [project] dependencies"


def test_compose_services_volumes_and_policies(compose):
    services = compose["services"]
    assert set(services) == {"api", "worker", "redis"}
    for name, service in services.items():
        assert service["restart"] == "unless-stopped", name
    for name in ("api", "worker"):
        svc = services[name]
        assert uses_our_image(svc) and svc["build"]["context"] == "..", name
        assert svc["image"] == services["api"]["image"], "api and worker run the same image"
        assert "store:/data" in svc["volumes"], name
        assert svc["environment"]["SORBRANK_DATA_DIR"] == "/data"
        assert svc["environment"]["SORBRANK_BROKER_URL"] == "redis://redis:6379/0"
        assert svc["depends_on"]["redis"]["condition"] == "service_healthy"
        assert "healthcheck" in svc, f"{name} overrides or confirms the image's check"
    assert int(services["worker"]["deploy"]["replicas"]) >= 1
    assert services["api"]["ports"] == [f"127.0.0.1:{API_PORT}:{API_PORT}"]
    assert services["api"]["environment"]["SORBRANK_TOKENS_FILE"] == \
        "/run/secrets/" + services["api"]["secrets"][0]
    assert set(compose["volumes"]) == {"store", "redis"}

    redis = services["redis"]
    assert redis["image"].split(":")[0] == "redis" and redis["image"].split(":")[1].startswith("7")
    assert redis["command"][0] == "redis-server"
    assert redis["command"][redis["command"].index("--appendonly") + 1] == "yes"
    assert "redis:/data" in redis["volumes"]
    assert "redis-cli ping" in " ".join(compose_test_argv(redis["healthcheck"]["test"]))


def test_compose_healthchecks_probe_liveness_and_readiness(compose):
    api_check = compose_test_argv(compose["services"]["api"]["healthcheck"]["test"])[-1]
    for path in ("/healthz", "/readyz"):
        assert path in api_check


def test_every_compose_command_is_a_package_entry_point(compose, tmp_path):
    commands = compose_commands(compose)
    assert {("api", "command"), ("api", "healthcheck"), ("worker", "command"),
            ("worker", "healthcheck")} <= commands.keys()
    assert commands[("worker", "command")][:2] == ["sorbrank", "worker"]
    for (service, what), argv in commands.items():
        assert command_problems(argv, tmp_path / f"{service}-{what}") == [], \
            f"{service} {what}: {argv}"


def test_commands_the_docker_readme_runs_in_a_service_are_entry_points(compose, tmp_path):
    text = (ROOT / "docker" / "README.md").read_text()
    runs = re.findall(r"docker compose [^\n]*? run (?:--\S+ )*(\w+) ([^#\n]+)", text)
    assert runs, "docker/README.md shows how to run a one-off command (migrate-store)"
    for service, command in runs:
        assert service in compose["services"], service
        assert command_problems(shlex.split(command), tmp_path / service) == [], command


def test_compose_interpolation_takes_the_environment():
    compose = load_compose({"SORBRANK_WORKER_CONCURRENCY": "7", "SORBRANK_WORKER_REPLICAS": "3"})
    worker = compose["services"]["worker"]
    assert worker["command"] == ["sorbrank", "worker", "--concurrency", "7"]
    assert worker["deploy"]["replicas"] == "3"


# -- the checkers catch what they are for ------------------------------------------------

BAD_DOCKERFILE = """\
FROM python:3.11-slim AS builder
RUN apt-get update && apt-get install -y build-essential
FROM python:3.11-slim
RUN apt-get update \\
    && apt-get install -y --no-install-recommends gcc libpq-dev
USER root
CMD ["sorbrank", "no-such-command"]
HEALTHCHECK CMD python -c "import urllib.request; urllib.request.urlopen("
"""


def test_checkers_reject_a_bad_dockerfile(tmp_path):
    bad = parse_dockerfile(BAD_DOCKERFILE)
    problems = final_stage_problems(bad)
    assert any("root" in p for p in problems)
    assert any("gcc" in p and "libpq-dev" in p for p in problems)
    assert not any("build-essential" in p for p in problems), "the builder may compile"
    assert final_stage_problems(parse_dockerfile("FROM python:3.11-slim\nCMD [\"x\"]\n")) == \
        ["final stage has no USER: it runs as root"]
    commands = dockerfile_commands(bad)
    assert command_problems(commands["CMD"], tmp_path) != []
    assert "does not compile" in command_problems(commands["HEALTHCHECK"], tmp_path)[0]


@pytest.mark.parametrize("argv, expected", [
    (["sorbrank", "worker", "--concurrency", "two"], "does not accept"),
    (["sorbrank"], "without a subcommand"),
    (["gunicorn", "--bind", "0.0.0.0:8000", "sorbrank.service.wsgi:nope"], "did not answer"),
    (["gunicorn", "--bind", "0.0.0.0:8000", "sorbrank.service.app:create_app"], "did not answer"),
    (["celery", "-A", "sorbrank.worker.celery_app", "worker"], "not an entry point"),
    # the repository's folder names are not import names of the installed package
    (["gunicorn", "--bind", "0.0.0.0:8000", "service.wsgi:app"], "did not answer"),
    (["python", "-c", "from worker.celery_app import app"], "imports 'worker.celery_app'"),
    (["sorbrank", "worker", "--concurrency", "2"], None),
])
def test_checkers_reject_commands_the_package_does_not_have(argv, expected, tmp_path):
    problems = command_problems(argv, tmp_path)
    if expected is None:  # the control: a command the package has
        assert problems == []
    else:
        assert problems and expected in problems[0], problems


# -- sorbrank.service.wsgi ------------------------------------------------------------------------

def _import_wsgi(env: dict[str, str]) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", "import sorbrank.service.wsgi as w; print(type(w.app).__name__)"],
                          cwd=AWAY, env=env, capture_output=True, text=True, timeout=60)


def test_wsgi_refuses_embedded_mode(tmp_path):
    env = wsgi_env(tmp_path)
    del env["SORBRANK_BROKER_URL"]
    run = _import_wsgi(env)
    assert run.returncode != 0 and "SORBRANK_BROKER_URL is not set" in run.stderr


def test_wsgi_refuses_to_serve_without_tokens_unless_allowed(tmp_path):
    env = wsgi_env(tmp_path)
    del env["SORBRANK_TOKENS"]
    run = _import_wsgi(env)
    assert run.returncode != 0 and "no tokens configured" in run.stderr
    run = _import_wsgi({**env, "SORBRANK_ALLOW_OPEN": "1"})
    assert run.returncode == 0 and run.stdout.strip() == "Flask", run.stderr


# ===================================================================================
# the health checks, run for real (gunicorn, redis-server, a Celery worker)

def _snippet(argv: list[str], port: int | None = None) -> str:
    assert argv[:2] == ["python", "-c"], argv
    code = argv[2]
    if port is not None:
        assert f"127.0.0.1:{API_PORT}" in code
        code = code.replace(f"127.0.0.1:{API_PORT}", f"127.0.0.1:{port}")
    return code


def _run_check(code: str, env: dict[str, str]) -> int:
    return subprocess.run([sys.executable, "-c", code], cwd=AWAY, env=env, capture_output=True,
                          text=True, timeout=60).returncode


@pytest.fixture(scope="module")
def stack(tmp_path_factory, instructions):
    """redis-server, the image's gunicorn command (bound to a free loopback port)
    and one Celery worker, as the compose file wires them."""
    if not shutil.which("redis-server") and not Path("/usr/bin/redis-server").exists():
        pytest.skip("redis-server is not installed (tests/run.sh installs it)")
    base = tmp_path_factory.mktemp("deploy-stack")
    procs = []
    try:
        _, redis_url = start_redis(base / "logs", procs)
        env = wsgi_env(base / "data", redis_url)
        env["GUNICORN_CMD_ARGS"] = dockerfile_env(instructions)["GUNICORN_CMD_ARGS"]
        port = free_port()
        argv = dockerfile_commands(instructions)["CMD"]
        argv = [a.replace(f"0.0.0.0:{API_PORT}", f"{LOOPBACK}:{port}") for a in argv]
        argv[argv.index("--workers") + 1] = "1"  # shared test machine
        gunicorn = str(Path(sys.executable).with_name("gunicorn"))
        api = start("gunicorn", [gunicorn, *argv[1:]], env, base / "logs", procs)
        wait_until(lambda: http_ok(f"http://{LOOPBACK}:{port}/healthz"), "gunicorn /healthz",
                   [api])
        start_worker(env, base / "logs", procs)
        yield {"port": port, "env": env, "redis_url": redis_url}
    finally:
        for proc in reversed(procs):
            proc.stop()


@pytest.mark.integration
def test_image_and_compose_api_checks_pass_on_a_ready_api(stack, instructions, compose):
    image_check = _snippet(dockerfile_commands(instructions)["HEALTHCHECK"], stack["port"])
    compose_check = _snippet(compose_commands(compose)[("api", "healthcheck")], stack["port"])
    assert _run_check(image_check, stack["env"]) == 0
    assert _run_check(compose_check, stack["env"]) == 0


@pytest.mark.integration
def test_api_checks_fail_when_nothing_listens(stack, instructions, compose):
    closed = free_port()
    for argv in (dockerfile_commands(instructions)["HEALTHCHECK"],
                 compose_commands(compose)[("api", "healthcheck")]):
        assert _run_check(_snippet(argv, closed), stack["env"]) != 0


@pytest.mark.integration
def test_compose_api_check_fails_when_the_broker_is_down(tmp_path, instructions, compose,
                                                          processes):
    """/readyz is 503 without Redis: the compose check fails, liveness still passes."""
    env = wsgi_env(tmp_path / "data", f"redis://{LOOPBACK}:{free_port()}/0")
    port = free_port()
    gunicorn = str(Path(sys.executable).with_name("gunicorn"))
    api = start("gunicorn-no-broker", [gunicorn, "--bind", f"{LOOPBACK}:{port}", "--workers", "1",
                                       "sorbrank.service.wsgi:app"], env, tmp_path / "logs", processes)
    wait_until(lambda: http_ok(f"http://{LOOPBACK}:{port}/healthz"), "gunicorn /healthz", [api])
    image_check = _snippet(dockerfile_commands(instructions)["HEALTHCHECK"], port)
    compose_check = _snippet(compose_commands(compose)[("api", "healthcheck")], port)
    assert _run_check(image_check, env) == 0
    assert _run_check(compose_check, env) != 0


@pytest.mark.integration
def test_worker_check_passes_only_when_this_hosts_worker_answers(stack, compose):
    check = _snippet(compose_commands(compose)[("worker", "healthcheck")])
    assert _run_check(check, stack["env"]) == 0
    # the same broker server, another database: no worker listens there
    other_db = stack["redis_url"].rsplit("/", 1)[0] + "/5"
    assert _run_check(check, {**stack["env"], "SORBRANK_BROKER_URL": other_db}) != 0


# ===================================================================================
# a compose client, when this machine has one

def _compose_client() -> list[str] | None:
    if shutil.which("docker"):
        probe = subprocess.run(["docker", "compose", "version"], capture_output=True, text=True,
                               timeout=30)
        if probe.returncode == 0:
            return ["docker", "compose"]
    if shutil.which("docker-compose"):
        return ["docker-compose"]
    return None


def test_compose_client_accepts_the_file(tmp_path):
    client = _compose_client()
    if client is None:
        reason = ("the docker client has no compose plugin ('docker compose version' failed) "
                  "and docker-compose is not installed" if shutil.which("docker")
                  else "neither the docker client nor docker-compose is installed")
        pytest.skip(reason)
    tokens = tmp_path / "tokens.json"
    tokens.write_text(tokens_json())
    env = {**os.environ, "SORBRANK_TOKENS_HOST_FILE": str(tokens)}
    run = subprocess.run([*client, "-f", str(COMPOSE), "config"], cwd=ROOT, env=env,
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr
    assert set(yaml.safe_load(run.stdout)["services"]) == {"api", "worker", "redis"}
