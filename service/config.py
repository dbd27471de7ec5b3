"""Settings from SORBRANK_* environment variables, checked once at start.

Every problem is collected and reported together, naming the variable, so a
misconfigured deployment fails at start with one readable message instead of
at the first request.
"""
from __future__ import annotations

import ipaddress
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping
from urllib.parse import urlsplit

from sorbrank.worker.logs import LEVELS
# defined beside the data types, so reading settings does not load the engine
from sorbrank.worker.isotherm import DEFAULT_CHUNK_SIZE

from .auth import Token, load_tokens

DEFAULT_MAX_UPLOAD_BYTES = 64 * 1024 * 1024


class ConfigError(ValueError):
    def __init__(self, problems: list[str]):
        self.problems = problems
        if len(problems) == 1:
            super().__init__(f"invalid configuration: {problems[0]}")
        else:
            super().__init__("invalid configuration:\n  " + "\n  ".join(problems))


@dataclass(frozen=True)
class Settings:
    # a local Path, or a URI string pyarrow.fs understands (s3://, gs://, file://)
    data_dir: Path | str = Path("./data")
    broker_url: str | None = None
    chunk_size: int = DEFAULT_CHUNK_SIZE
    max_upload_bytes: int = DEFAULT_MAX_UPLOAD_BYTES
    embedded_workers: int = field(default_factory=lambda: os.cpu_count() or 1)
    tokens: tuple[Token, ...] = ()
    allow_open: bool = False
    # passed to intake's Limits; empty = intake's own defaults
    intake_limits: tuple[tuple[str, int], ...] = ()
    worker_concurrency: int = field(default_factory=lambda: os.cpu_count() or 1)
    worker_metrics_port: int | None = None  # None: 'sorbrank worker' serves no metrics
    worker_metrics_host: str = "0.0.0.0"
    log_level: str = "INFO"
    # read by worker/celery_app.py itself; checked here so a bad value stops at start
    task_soft_limit_s: int = 1500
    task_hard_limit_s: int = 1800
    task_max_retries: int = 2

    @property
    def mode(self) -> str:
        return "distributed" if self.broker_url else "embedded"


def _int(env, name, default, problems, minimum=1):
    raw = env.get(name, "").strip()
    if not raw:
        return default
    try:
        value = int(raw)
    except ValueError:
        problems.append(f"{name}={raw!r}: expected a whole number")
        return default
    if value < minimum:
        problems.append(f"{name}={value}: must be at least {minimum}")
    return value


def redact_url(url: str) -> str:
    """``url`` with any password replaced, safe to print."""
    try:
        parts = urlsplit(url)
        if parts.password is None:
            return url
        netloc = parts.netloc.replace(f":{parts.password}@", ":***@", 1)
        return parts._replace(netloc=netloc).geturl()
    except ValueError:
        return "(unparseable URL)"


def broker_url_problem(url: str) -> str | None:
    """Why ``url`` is not a usable Redis broker URL (None = fine)."""
    shown = redact_url(url)
    expected = "expected redis://[:password@]host:port/db, rediss://... or unix:///path"
    try:
        parts = urlsplit(url)
        port = parts.port  # raises ValueError when not a number in range
    except ValueError as exc:
        return f"SORBRANK_BROKER_URL={shown!r}: {exc}; {expected}"
    if parts.scheme in ("redis", "rediss"):
        db = parts.path.strip("/")
        if not parts.hostname:
            return f"SORBRANK_BROKER_URL={shown!r}: no host; {expected}"
        if db and not db.isdigit():
            return f"SORBRANK_BROKER_URL={shown!r}: database {db!r} is not a number; {expected}"
        return None
    if parts.scheme == "unix" and parts.path and port is None:
        return None
    return f"SORBRANK_BROKER_URL={shown!r}: {expected}"


def data_dir_problem(raw: str) -> str | None:
    """Why SORBRANK_DATA_DIR cannot name a store root (None = fine)."""
    if "://" in raw:
        import pyarrow.fs

        try:
            pyarrow.fs.FileSystem.from_uri(raw)
        except (ValueError, OSError) as exc:  # unknown scheme, bad URI, unsupported build
            return f"SORBRANK_DATA_DIR={raw!r}: not a filesystem URI pyarrow understands ({exc})"
        return None
    path = Path(raw)
    if path.exists() and not path.is_dir():
        return f"SORBRANK_DATA_DIR={raw}: exists and is not a directory"
    return None


def load_settings(env: Mapping[str, str] | None = None) -> Settings:
    env = os.environ if env is None else env
    problems: list[str] = []
    broker = env.get("SORBRANK_BROKER_URL", "").strip() or None
    if broker and (problem := broker_url_problem(broker)):
        problems.append(problem)
    data_dir_raw = env.get("SORBRANK_DATA_DIR", "").strip() or "./data"
    if problem := data_dir_problem(data_dir_raw):
        problems.append(problem)
    log_level = env.get("SORBRANK_LOG_LEVEL", "").strip().upper() or "INFO"
    if log_level not in LEVELS:
        problems.append(f"SORBRANK_LOG_LEVEL={log_level!r}: expected one of {', '.join(LEVELS)}")
    metrics_port = None
    if env.get("SORBRANK_WORKER_METRICS_PORT", "").strip():
        metrics_port = _int(env, "SORBRANK_WORKER_METRICS_PORT", 0, problems)
        if metrics_port > 65535:
            problems.append(f"SORBRANK_WORKER_METRICS_PORT={metrics_port}: not a TCP port")
    allow_open_raw = env.get("SORBRANK_ALLOW_OPEN", "").strip()
    if allow_open_raw not in ("", "0", "1"):
        problems.append(f"SORBRANK_ALLOW_OPEN={allow_open_raw!r}: expected 0 or 1")
    try:
        tokens = tuple(load_tokens(env))
    except ValueError as exc:
        problems.append(str(exc))
        tokens = ()
    limits = []
    for var, key in (("SORBRANK_MAX_ISOTHERMS", "max_isotherms"),
                     ("SORBRANK_MAX_POINTS_PER_ISOTHERM", "max_points_per_isotherm")):
        if env.get(var, "").strip():
            limits.append((key, _int(env, var, 0, problems)))
    soft_limit_s = _int(env, "SORBRANK_TASK_SOFT_LIMIT_S", 1500, problems)
    settings = Settings(
        data_dir=data_dir_raw if "://" in data_dir_raw else Path(data_dir_raw),
        broker_url=broker,
        chunk_size=_int(env, "SORBRANK_CHUNK_SIZE", DEFAULT_CHUNK_SIZE, problems),
        max_upload_bytes=_int(env, "SORBRANK_MAX_UPLOAD_BYTES", DEFAULT_MAX_UPLOAD_BYTES, problems),
        embedded_workers=_int(env, "SORBRANK_EMBEDDED_WORKERS", os.cpu_count() or 1, problems),
        tokens=tokens,
        allow_open=allow_open_raw == "1",
        intake_limits=tuple(limits),
        worker_concurrency=_int(env, "SORBRANK_WORKER_CONCURRENCY", os.cpu_count() or 1, problems),
        worker_metrics_port=metrics_port,
        worker_metrics_host=env.get("SORBRANK_WORKER_METRICS_HOST", "").strip() or "0.0.0.0",
        log_level=log_level,
        task_soft_limit_s=soft_limit_s,
        task_hard_limit_s=_int(env, "SORBRANK_TASK_HARD_LIMIT_S", max(1800, soft_limit_s + 1),
                               problems, minimum=soft_limit_s + 1),
        task_max_retries=_int(env, "SORBRANK_TASK_MAX_RETRIES", 2, problems, minimum=0),
    )
    if problems:
        raise ConfigError(problems)
    return settings


def store_problem(settings: Settings) -> str | None:
    """Why the store root cannot take writes right now (None = it can)."""
    from sorbrank.worker.store import Store

    try:
        Store(settings.data_dir).check_writable()
    except OSError as exc:
        reason = exc.strerror or str(exc) or type(exc).__name__
        return f"SORBRANK_DATA_DIR={settings.data_dir}: the store root is not writable ({reason})"
    return None


def broker_problem(settings: Settings, timeout_s: float = 3.0) -> str | None:
    """Why the broker does not answer a PING within ``timeout_s`` (None = it does)."""
    if not settings.broker_url:
        return None
    import redis

    try:
        client = redis.Redis.from_url(settings.broker_url, socket_timeout=timeout_s,
                                      socket_connect_timeout=timeout_s, retry_on_error=[])
        client.ping()
    except (redis.RedisError, ValueError) as exc:
        return (f"SORBRANK_BROKER_URL={redact_url(settings.broker_url)}: the broker does not "
                f"answer ({exc})")
    return None


def start_problems(settings: Settings) -> list[str]:
    """What only a live check finds, for commands to refuse to start on."""
    return [p for p in (store_problem(settings), broker_problem(settings)) if p]


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def open_access_verdict(settings: Settings, host: str) -> tuple[bool, str | None]:
    """(may start, warning to print loudly) for a server bound to ``host``."""
    if settings.tokens:
        return True, None
    if is_loopback(host):
        return True, (f"NO TOKENS CONFIGURED: the API on {host} is open to every local user "
                      "(set SORBRANK_TOKENS_FILE to require bearer tokens)")
    if settings.allow_open:
        return True, (f"NO TOKENS CONFIGURED and bound to {host}: ANYONE WHO CAN REACH THIS "
                      "HOST CAN SUBMIT AND READ (SORBRANK_ALLOW_OPEN=1)")
    return False, (f"refusing to serve on {host} without tokens: configure SORBRANK_TOKENS_FILE "
                   "or SORBRANK_TOKENS, bind to 127.0.0.1, or set SORBRANK_ALLOW_OPEN=1")
