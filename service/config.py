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

from .auth import Token, load_tokens

DEFAULT_CHUNK_SIZE = 500
DEFAULT_MAX_UPLOAD_BYTES = 64 * 1024 * 1024


class ConfigError(ValueError):
    def __init__(self, problems: list[str]):
        self.problems = problems
        super().__init__("invalid configuration:\n  " + "\n  ".join(problems))


@dataclass(frozen=True)
class Settings:
    data_dir: Path = Path("./data")
    broker_url: str | None = None
    chunk_size: int = DEFAULT_CHUNK_SIZE
    max_upload_bytes: int = DEFAULT_MAX_UPLOAD_BYTES
    embedded_workers: int = field(default_factory=lambda: os.cpu_count() or 1)
    tokens: tuple[Token, ...] = ()
    allow_open: bool = False
    # passed to intake's Limits; empty = intake's own defaults
    intake_limits: tuple[tuple[str, int], ...] = ()

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


def load_settings(env: Mapping[str, str] | None = None) -> Settings:
    env = os.environ if env is None else env
    problems: list[str] = []
    broker = env.get("SORBRANK_BROKER_URL", "").strip() or None
    if broker and not broker.startswith(("redis://", "rediss://", "unix://")):
        problems.append(f"SORBRANK_BROKER_URL={broker!r}: expected redis://host:port/db")
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
    settings = Settings(
        data_dir=Path(env.get("SORBRANK_DATA_DIR", "").strip() or "./data"),
        broker_url=broker,
        chunk_size=_int(env, "SORBRANK_CHUNK_SIZE", DEFAULT_CHUNK_SIZE, problems),
        max_upload_bytes=_int(env, "SORBRANK_MAX_UPLOAD_BYTES", DEFAULT_MAX_UPLOAD_BYTES, problems),
        embedded_workers=_int(env, "SORBRANK_EMBEDDED_WORKERS", os.cpu_count() or 1, problems),
        tokens=tokens,
        allow_open=allow_open_raw == "1",
        intake_limits=tuple(limits),
    )
    if settings.data_dir.exists() and not settings.data_dir.is_dir():
        problems.append(f"SORBRANK_DATA_DIR={settings.data_dir}: exists and is not a directory")
    if problems:
        raise ConfigError(problems)
    return settings


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
