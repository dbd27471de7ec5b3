"""Process handling shared by the benchmarks that start real servers:
free loopback ports, process groups that are always stopped, bounded waits;
and the repository's code at a git revision, for side-by-side baselines."""
from __future__ import annotations

import io
import os
import shutil
import signal
import socket
import subprocess
import tarfile
import time
from pathlib import Path

LOOPBACK = "127.0.0.1"
ROOT = Path(__file__).resolve().parents[1]


def code_at(rev: str, into: Path, *paths: str) -> Path:
    """The repository's files at ``rev`` (only ``paths`` if given), extracted
    into ``into`` (read-only for the repository); returns ``into``."""
    archive = subprocess.run(["git", "archive", "--format=tar", rev, *paths], cwd=ROOT,
                             capture_output=True, check=True).stdout
    with tarfile.open(fileobj=io.BytesIO(archive)) as tar:
        tar.extractall(into, filter="data")
    return into


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((LOOPBACK, 0))
        return s.getsockname()[1]


class Procs:
    """Processes started here, each in its own group; all stopped by ``stop_all``."""

    def __init__(self, log_dir: Path):
        self.log_dir = log_dir
        self.procs: list[tuple[str, subprocess.Popen, Path]] = []

    def start(self, name: str, args: list[str], env: dict, cwd: Path | None = None):
        log = self.log_dir / f"{name}.log"
        with open(log, "ab") as fh:
            popen = subprocess.Popen(args, env=env, cwd=str(cwd or self.log_dir), stdout=fh,
                                     stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                     start_new_session=True)
        self.procs.append((name, popen, log))
        return popen, log

    def stop_all(self) -> int:
        stopped = 0
        for _, popen, _ in reversed(self.procs):
            if popen.poll() is None:
                try:
                    os.killpg(popen.pid, signal.SIGTERM)
                except ProcessLookupError:
                    pass
                try:
                    popen.wait(timeout=20)
                except subprocess.TimeoutExpired:
                    pass
            try:  # pool children may outlive their parent
                os.killpg(popen.pid, signal.SIGKILL)
            except (ProcessLookupError, PermissionError):
                pass
            if popen.poll() is None:
                popen.wait(timeout=10)
            stopped += 1
        return stopped


def wait_for(check, what: str, procs: Procs, timeout_s: float, interval_s: float = 0.1):
    deadline = time.monotonic() + timeout_s
    while True:
        result = check()
        if result:
            return result
        for name, popen, log in procs.procs:
            if popen.poll() is not None:
                raise SystemExit(f"{name} exited while waiting for {what}:\n"
                                 + log.read_text(errors="replace")[-3000:])
        if time.monotonic() > deadline:
            raise SystemExit(f"gave up waiting for {what}")
        time.sleep(interval_s)


def start_redis(procs: Procs, data_dir: Path) -> str:
    """A throwaway redis-server on a free loopback port (never 6379), nothing
    persisted; returns its base URL (append "/<db>") once it answers PING."""
    import redis

    binary = shutil.which("redis-server") or "/usr/bin/redis-server"
    port = free_port()
    procs.start("redis", [binary, "--port", str(port), "--bind", LOOPBACK, "--save", "",
                          "--appendonly", "no", "--dir", str(data_dir)], dict(os.environ))
    url = f"redis://{LOOPBACK}:{port}"

    def pong():
        try:
            return redis.Redis.from_url(url + "/0", socket_timeout=1).ping()
        except redis.RedisError:
            return False

    wait_for(pong, "redis-server", procs, 30)
    return url
