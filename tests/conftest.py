"""Shared fixtures: free loopback ports and real processes (redis-server, Celery
worker, ``sorbrank serve``), each started in its own process group and
stopped by the fixture that started it. Every wait is bounded."""
from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
LOOPBACK = "127.0.0.1"

# Bearer tokens of the test services (only their SHA-256 goes to the server)
TOKENS = {"submitter": ("t-submit-0f3a", ["submit", "read"]),
          "reader": ("t-read-77c1", ["read"]),
          "admin": ("t-admin-9e2d", ["admin"])}


def tokens_json() -> str:
    import hashlib

    return json.dumps([{"name": name, "sha256": hashlib.sha256(secret.encode()).hexdigest(),
                        "scopes": scopes} for name, (secret, scopes) in TOKENS.items()])


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((LOOPBACK, 0))
        return s.getsockname()[1]


def clean_env(**overrides: str) -> dict[str, str]:
    """The test runner's environment without any SORBRANK_* leaking in."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("SORBRANK_")}
    env["PYTHONUNBUFFERED"] = "1"
    env.update(overrides)
    return env


@dataclass
class Proc:
    name: str
    popen: subprocess.Popen
    log: Path

    def log_text(self) -> str:
        try:
            return self.log.read_text(errors="replace")
        except FileNotFoundError:
            return ""

    def alive(self) -> bool:
        return self.popen.poll() is None

    def stop(self) -> None:
        """SIGTERM to the whole group, SIGKILL if it lingers; always reaped."""
        if self.popen.poll() is None:
            try:
                os.killpg(self.popen.pid, signal.SIGTERM)
            except ProcessLookupError:
                pass
            try:
                self.popen.wait(timeout=15)
            except subprocess.TimeoutExpired:
                pass
        try:  # children (pool processes) may outlive their parent
            os.killpg(self.popen.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass
        if self.popen.poll() is None:
            self.popen.wait(timeout=10)


def start(name: str, args: list[str], env: dict[str, str], log_dir: Path,
          registry: list[Proc]) -> Proc:
    """Start ``args`` in a new process group, registered for stopping at once."""
    log_dir.mkdir(parents=True, exist_ok=True)
    log = log_dir / f"{name}.log"
    with open(log, "ab") as fh:
        popen = subprocess.Popen(args, env=env, cwd=str(log_dir), stdout=fh,
                                 stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                 start_new_session=True)
    proc = Proc(name, popen, log)
    registry.append(proc)
    return proc


def wait_until(check, what: str, procs: list[Proc] = (), timeout_s: float = 90.0,
               interval_s: float = 0.1):
    """Poll ``check()`` until it returns something truthy; fail with logs otherwise."""
    deadline = time.monotonic() + timeout_s
    for _ in range(int(timeout_s / interval_s) + 1):
        result = check()
        if result:
            return result
        for proc in procs:
            if not proc.alive():
                pytest.fail(f"{proc.name} exited ({proc.popen.returncode}) while waiting for "
                            f"{what}:\n{proc.log_text()[-4000:]}")
        if time.monotonic() > deadline:
            break
        time.sleep(interval_s)
    logs = "\n".join(f"--- {p.name}\n{p.log_text()[-3000:]}" for p in procs)
    pytest.fail(f"gave up waiting for {what}\n{logs}")


def http_ok(url: str) -> bool:
    import requests

    try:
        return requests.get(url, timeout=2).status_code == 200
    except requests.RequestException:
        return False


def start_redis(log_dir: Path, registry: list[Proc]) -> tuple[Proc, str]:
    binary = shutil.which("redis-server") or "/usr/bin/redis-server"
    port = free_port()
    proc = start("redis", [binary, "--port", str(port), "--bind", LOOPBACK, "--save", "",
                           "--appendonly", "no", "--dir", str(log_dir)],
                 clean_env(), log_dir, registry)
    url = f"redis://{LOOPBACK}:{port}/0"

    def pong():
        import redis

        try:
            return redis.Redis.from_url(url, socket_timeout=1).ping()
        except redis.RedisError:
            return False

    wait_until(pong, "redis-server to answer PING", [proc])
    return proc, url


def start_worker(env: dict[str, str], log_dir: Path, registry: list[Proc],
                 name: str = "celery-worker") -> Proc:
    proc = start(name, [sys.executable, "-m", "sorbrank.service.cli", "worker", "--concurrency", "1"],
                 env, log_dir, registry)
    wait_until(lambda: " ready." in proc.log_text(), "the Celery worker to be ready", [proc])
    return proc


def start_server(env: dict[str, str], log_dir: Path, registry: list[Proc],
                 name: str = "server") -> tuple[Proc, str]:
    port = free_port()
    proc = start(name, [sys.executable, "-m", "sorbrank.service.cli", "serve", "--host", LOOPBACK,
                        "--port", str(port)], env, log_dir, registry)
    url = f"http://{LOOPBACK}:{port}"
    wait_until(lambda: http_ok(url + "/healthz"), f"{name} to answer /healthz", [proc])
    return proc, url


@dataclass
class Service:
    mode: str
    url: str
    data_dir: Path
    env: dict[str, str]
    log_dir: Path
    procs: list[Proc] = field(default_factory=list)
    redis_url: str | None = None

    @property
    def api(self) -> str:
        return self.url + "/api/v1"

    def session(self, who: str = "submitter"):
        import requests

        s = requests.Session()
        s.headers["Authorization"] = f"Bearer {TOKENS[who][0]}"
        return s


MAX_UPLOAD_BYTES = 200_000


@pytest.fixture(scope="module", params=["embedded", "distributed"])
def service(request, tmp_path_factory):
    """A real ``sorbrank serve`` (plus redis-server and a Celery worker when
    distributed), with tokens, a small upload limit and 2-isotherm chunks."""
    mode = request.param
    base = tmp_path_factory.mktemp(f"service-{mode}")
    data_dir = base / "data"
    env = clean_env(SORBRANK_DATA_DIR=str(data_dir), SORBRANK_CHUNK_SIZE="2",
                    SORBRANK_EMBEDDED_WORKERS="1", SORBRANK_TOKENS=tokens_json(),
                    SORBRANK_MAX_UPLOAD_BYTES=str(MAX_UPLOAD_BYTES),
                    PYTHONPATH=str(ROOT))
    svc = Service(mode, "", data_dir, env, base / "logs")
    try:
        if mode == "distributed":
            _, svc.redis_url = start_redis(svc.log_dir, svc.procs)
            env["SORBRANK_BROKER_URL"] = svc.redis_url
            start_worker(env, svc.log_dir, svc.procs)
        _, svc.url = start_server(env, svc.log_dir, svc.procs)
        yield svc
    finally:
        for proc in reversed(svc.procs):  # server first, redis last
            proc.stop()


@pytest.fixture
def processes():
    """A registry for processes a test starts itself; all stopped at its end."""
    registry: list[Proc] = []
    try:
        yield registry
    finally:
        for proc in reversed(registry):
            proc.stop()


# -- small invented batches (Langmuir data, canonical-ish units) -----------------

PRESSURES_KPA = (1, 2, 5, 10, 20, 40, 60, 80, 100)


def isotherm(sorbent_id: str, q_sat: float, b_per_kpa: float, temperature_k: float = 298.15,
             adsorbate: str = "CO2") -> dict:
    return {"sorbent_id": sorbent_id, "adsorbate": adsorbate, "temperature_k": temperature_k,
            "pressure": list(PRESSURES_KPA),
            "loading": [round(q_sat * b_per_kpa * p / (1 + b_per_kpa * p), 6) for p in PRESSURES_KPA]}


def csv_batch(isotherms: list[dict], extra_lines: tuple[str, ...] = ()) -> bytes:
    lines = ["sorbent_id,adsorbate,temperature_k,pressure_kpa,loading_mol_per_kg"]
    for iso in isotherms:
        for p, q in zip(iso["pressure"], iso["loading"]):
            lines.append(f"{iso['sorbent_id']},{iso['adsorbate']},{iso['temperature_k']},{p},{q}")
    lines.extend(extra_lines)
    return ("\n".join(lines) + "\n").encode()


def json_batch(isotherms: list[dict], label: str | None = None) -> bytes:
    doc = {"units": {"pressure": "kPa", "loading": "mol/kg"}, "isotherms": isotherms}
    if label:
        doc["batch_label"] = label
    return json.dumps(doc).encode()


def parquet_batch(isotherms: list[dict]) -> bytes:
    import io

    import pyarrow as pa
    import pyarrow.parquet as pq

    rows = [{"sorbent_id": iso["sorbent_id"], "adsorbate": iso["adsorbate"],
             "temperature_k": iso["temperature_k"], "pressure_kpa": float(p),
             "loading_mol_per_kg": float(q)}
            for iso in isotherms for p, q in zip(iso["pressure"], iso["loading"])]
    sink = io.BytesIO()
    pq.write_table(pa.Table.from_pylist(rows), sink)
    return sink.getvalue()


# -- PostgreSQL: a throwaway server from Debian's postgresql package ----------------
# initdb in a temp dir, the server on a free loopback port (never the machine's
# 5432), its unix socket in that dir, trust auth; stopped and removed at the end.
# initdb refuses to run as root, so under root the programs run as the
# unprivileged `postgres` system user the Debian package creates.

PG_INSTALL_HINT = ("install Debian's postgresql package (apt-get install postgresql; "
                   "tests/run.sh does this when run as root)")


def postgres_bin_dir() -> Path | None:
    """The newest /usr/lib/postgresql/<major>/bin that has the server programs."""
    found = []
    for bin_dir in Path("/usr/lib/postgresql").glob("*/bin"):
        if all((bin_dir / p).is_file() for p in ("initdb", "postgres", "pg_ctl")):
            major = bin_dir.parent.name
            found.append((int(major) if major.isdigit() else -1, bin_dir))
    return max(found)[1] if found else None


@dataclass
class Postgres:
    """A running PostgreSQL server of the test session (superuser ``postgres``)."""

    host: str
    port: int
    socket_dir: Path
    data_dir: Path
    proc: Proc
    _databases: list[str] = field(default_factory=list)

    def conninfo(self, dbname: str = "postgres") -> str:
        return f"host={self.host} port={self.port} user=postgres dbname={dbname}"

    def connect(self, dbname: str = "postgres", **kwargs):
        import psycopg

        kwargs.setdefault("connect_timeout", 10)
        return psycopg.connect(self.conninfo(dbname), **kwargs)

    def new_database(self, prefix: str = "t") -> str:
        """A fresh, empty database (dropped when the server goes)."""
        name = f"{prefix}_{len(self._databases)}_{os.getpid()}"
        with self.connect(autocommit=True) as conn:
            conn.execute(f'CREATE DATABASE "{name}"')
        self._databases.append(name)
        return name


def _postgres_user() -> dict:
    """Popen arguments that run a program as the unprivileged server owner."""
    if os.geteuid() != 0:
        return {}
    import pwd

    try:
        entry = pwd.getpwnam("postgres")
    except KeyError:
        pytest.skip("running as root, and initdb refuses root, but there is no 'postgres' "
                    "user to run it as: " + PG_INSTALL_HINT)
    return {"user": entry.pw_uid, "group": entry.pw_gid, "extra_groups": []}


@pytest.fixture(scope="session")
def postgres():
    """A real PostgreSQL server for the session (see ``Postgres``)."""
    import tempfile

    try:
        import psycopg
    except ImportError:
        pytest.skip("psycopg is missing: pip install -e '.[test]'")
    bin_dir = postgres_bin_dir()
    if bin_dir is None:
        pytest.skip("no initdb/postgres/pg_ctl under /usr/lib/postgresql/*/bin: " + PG_INSTALL_HINT)
    as_owner = _postgres_user()
    # under /tmp itself: pytest's own temp root is private to root (0700), so
    # the postgres user could not reach a data dir below it
    base = Path(tempfile.mkdtemp(prefix="sorbrank-pg-"))
    registry: list[Proc] = []
    try:
        if as_owner:
            os.chown(base, as_owner["user"], as_owner["group"])
        data_dir, socket_dir = base / "data", base / "socket"
        env = clean_env(LC_ALL="C", LANG="C", PGTZ="UTC")
        env.pop("PGDATA", None)
        with open(base / "initdb.log", "wb") as log:
            done = subprocess.run(
                [str(bin_dir / "initdb"), "-D", str(data_dir), "-U", "postgres", "--auth=trust",
                 "--encoding=UTF8", "--no-locale", "--no-sync"],
                env=env, cwd=str(base), stdout=log, stderr=subprocess.STDOUT,
                stdin=subprocess.DEVNULL, timeout=120, **as_owner)
        if done.returncode != 0:
            pytest.fail(f"initdb failed ({done.returncode}):\n"
                        + (base / "initdb.log").read_text(errors="replace")[-4000:])
        socket_dir.mkdir()
        if as_owner:
            os.chown(socket_dir, as_owner["user"], as_owner["group"])
        port = free_port()
        log_path = base / "postgres.log"
        # a throwaway cluster: durability off (its data dies with the test run)
        args = [str(bin_dir / "postgres"), "-D", str(data_dir), "-p", str(port),
                "-c", f"listen_addresses={LOOPBACK}", "-c", f"unix_socket_directories={socket_dir}",
                "-c", "fsync=off", "-c", "synchronous_commit=off", "-c", "full_page_writes=off",
                "-c", "max_connections=20", "-c", "shared_buffers=16MB", "-c", "TimeZone=UTC"]
        with open(log_path, "ab") as log:
            popen = subprocess.Popen(args, env=env, cwd=str(base), stdout=log,
                                     stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                     start_new_session=True, **as_owner)
        proc = Proc("postgres", popen, log_path)
        registry.append(proc)
        server = Postgres(LOOPBACK, port, socket_dir, data_dir, proc)

        def accepts() -> bool:
            try:
                with server.connect(connect_timeout=2) as conn:
                    return conn.execute("SELECT 1").fetchone() == (1,)
            except psycopg.OperationalError:
                return False

        wait_until(accepts, "PostgreSQL to accept connections", [proc], timeout_s=60)
        yield server
    finally:
        for proc in registry:  # SIGTERM ends the backends, then the postmaster
            proc.stop()
        shutil.rmtree(base, ignore_errors=True)
