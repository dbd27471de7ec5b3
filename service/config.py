"""Settings from SORBRANK_* environment variables, checked once at start.

Every problem is collected and reported together, naming the variable, so a
misconfigured deployment fails at start with one readable message instead of
at the first request. The settings the Celery app reads as well (store
root, broker, log level, task limits and retries) are parsed by
``sorbrank.worker.settings.read_shared``, the parser the Celery app uses.
"""
from __future__ import annotations

import ipaddress
import os
from dataclasses import dataclass, field, fields
from typing import Mapping

# defined beside the data types, so reading settings does not load the engine
from sorbrank.worker.isotherm import DEFAULT_CHUNK_SIZE
# the rules the Celery app applies too: one parser for both
from sorbrank.worker.settings import (
    ConfigError, SharedSettings, broker_url_problem, data_dir_problem, env_int, read_shared,
    redact_url,
)

from .auth import Token, load_tokens

DEFAULT_MAX_UPLOAD_BYTES = 64 * 1024 * 1024
# Parsing JSON costs ~44x the body in memory (measured: Python objects per
# number, then arrays), Parquet and CSV far less: 8 MiB of JSON (~700,000
# points) peaks near 400 MB, so two at once stay well under 1.5 GB
DEFAULT_MAX_JSON_BYTES = 8 * 1024 * 1024
# intakes parsing at once per API process; more wait as 503 + Retry-After
DEFAULT_MAX_CONCURRENT_INTAKES = 2
# the embedded server (waitress): an idle or stalled connection is closed
# after this many seconds; requests are handed to a thread only once complete
DEFAULT_HTTP_TIMEOUT_S = 30
DEFAULT_HTTP_THREADS = 8

__all__ = ["ConfigError", "Settings", "broker_url_problem", "data_dir_problem", "load_settings",
           "open_access_verdict", "redact_url", "start_problems", "store_problem"]


@dataclass(frozen=True)
class Settings(SharedSettings):
    """The shared settings (store root, broker, log level, task limits, file mode, free
    space: one parser with the Celery app) and those only the API and CLI read."""

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
    max_json_bytes: int = DEFAULT_MAX_JSON_BYTES
    max_concurrent_intakes: int = DEFAULT_MAX_CONCURRENT_INTAKES
    http_timeout_s: int = DEFAULT_HTTP_TIMEOUT_S
    http_threads: int = DEFAULT_HTTP_THREADS

    @property
    def mode(self) -> str:
        return "distributed" if self.broker_url else "embedded"


def load_settings(env: Mapping[str, str] | None = None) -> Settings:
    env = os.environ if env is None else env
    problems: list[str] = []
    shared = read_shared(env, problems)
    metrics_port = None
    if env.get("SORBRANK_WORKER_METRICS_PORT", "").strip():
        metrics_port = env_int(env, "SORBRANK_WORKER_METRICS_PORT", 0, problems)
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
            limits.append((key, env_int(env, var, 0, problems)))
    max_json_bytes = env_int(env, "SORBRANK_MAX_JSON_BYTES", DEFAULT_MAX_JSON_BYTES, problems)
    # the shared fields as read_shared parsed them (a bad value is refused at start by
    # 'sorbrank serve/worker' as by the Celery app), then the API's own
    settings = Settings(
        **{f.name: getattr(shared, f.name) for f in fields(SharedSettings)},
        chunk_size=env_int(env, "SORBRANK_CHUNK_SIZE", DEFAULT_CHUNK_SIZE, problems),
        max_upload_bytes=env_int(env, "SORBRANK_MAX_UPLOAD_BYTES", DEFAULT_MAX_UPLOAD_BYTES,
                                 problems),
        embedded_workers=env_int(env, "SORBRANK_EMBEDDED_WORKERS", os.cpu_count() or 1, problems),
        tokens=tokens,
        allow_open=allow_open_raw == "1",
        # intake refuses an over-long JSON text itself too (sorbrank fit, the Python API)
        intake_limits=tuple(limits) + (("max_json_bytes", max_json_bytes),),
        worker_concurrency=env_int(env, "SORBRANK_WORKER_CONCURRENCY", os.cpu_count() or 1,
                                   problems),
        worker_metrics_port=metrics_port,
        worker_metrics_host=env.get("SORBRANK_WORKER_METRICS_HOST", "").strip() or "0.0.0.0",
        max_json_bytes=max_json_bytes,
        max_concurrent_intakes=env_int(env, "SORBRANK_MAX_CONCURRENT_INTAKES",
                                       DEFAULT_MAX_CONCURRENT_INTAKES, problems),
        http_timeout_s=env_int(env, "SORBRANK_HTTP_TIMEOUT_S", DEFAULT_HTTP_TIMEOUT_S, problems),
        http_threads=env_int(env, "SORBRANK_HTTP_THREADS", DEFAULT_HTTP_THREADS, problems),
    )
    if problems:
        raise ConfigError(problems)
    return settings


def store_problem(settings: Settings) -> str | None:
    """Why the store cannot be used right now: not writable, or written by an
    older sorbrank and not yet migrated (None = it can be used)."""
    from sorbrank.worker.store import Store

    store = Store(settings.data_dir)
    try:
        store.check_writable()
    except OSError as exc:
        reason = exc.strerror or str(exc) or type(exc).__name__
        return f"SORBRANK_DATA_DIR={settings.data_dir}: the store root is not writable ({reason})"
    if problem := store.schema_problem():
        return f"SORBRANK_DATA_DIR={settings.data_dir}: {problem}"
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
