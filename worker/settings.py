"""The SORBRANK_* settings that the API and the Celery app both read, with one
parser and one set of rules.

``service/config.py`` (API, ``sorbrank serve``/``worker``, gunicorn) and
``worker/celery_app.py`` (also started directly as ``celery -A
sorbrank.worker.celery_app``) both call ``read_shared``, so a variable gives the
same value, or the same message, in every process. Problems are collected and
reported together, each naming its variable.

SORBRANK_DATA_DIR              store root: a path or a URI pyarrow.fs understands (default ./data)
SORBRANK_BROKER_URL            redis://[:password@]host:port/db, rediss://..., unix:///path
                               (unset = embedded mode; ``sorbrank worker`` requires it)
SORBRANK_LOG_LEVEL             DEBUG, INFO, WARNING or ERROR (default INFO)
SORBRANK_TASK_SOFT_LIMIT_S     soft time limit per chunk, seconds (default 1500)
SORBRANK_TASK_HARD_LIMIT_S     hard time limit per chunk, seconds (default 1800); must
                               exceed the soft limit, or the settings are refused
SORBRANK_TASK_MAX_RETRIES      retries after a failed chunk (default 2)
SORBRANK_RECONCILE_INTERVAL_S  how often a Celery worker checks for a broker that lost
                               queued chunks, seconds; 0 = only at start (default 60)
SORBRANK_FILE_MODE             permission bits of the files written into a local store, in
                               octal (default 0640); directories get the same bits plus
                               search (x) wherever read is given: 0660 lets an API and workers
                               running as different users of one group share a store
SORBRANK_MIN_FREE_BYTES        free space a local store must keep, bytes (default 67108864,
                               64 MiB; 0 = no check): below it /readyz answers 503 and
                               POST /batches 507, so a nearly full disk refuses new batches
                               before it fails the ones already accepted
"""
from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping
from urllib.parse import urlsplit

from .logs import DEFAULT_LEVEL, LEVELS

DEFAULT_DATA_DIR = "./data"
DEFAULT_TASK_SOFT_LIMIT_S = 1500
DEFAULT_TASK_HARD_LIMIT_S = 1800
DEFAULT_TASK_MAX_RETRIES = 2
DEFAULT_RECONCILE_INTERVAL_S = 60
# owner read-write, group read, nothing for others: a store holds a lab's
# unpublished measurements, and a reader in the group needs no write bit
DEFAULT_FILE_MODE = 0o640
# room for the result files of the chunks already accepted (a chunk of 2,000
# isotherms writes a few MB) before new batches are refused
DEFAULT_MIN_FREE_BYTES = 64 * 1024 * 1024


class ConfigError(ValueError):
    """Settings that cannot run; ``problems`` names each variable at fault."""

    def __init__(self, problems: list[str]):
        self.problems = problems
        if len(problems) == 1:
            super().__init__(f"invalid configuration: {problems[0]}")
        else:
            super().__init__("invalid configuration:\n  " + "\n  ".join(problems))


def env_int(env: Mapping[str, str], name: str, default: int, problems: list[str],
            minimum: int = 1) -> int:
    """``name`` as a whole number >= ``minimum`` (``default`` when unset or
    blank); a bad value is appended to ``problems`` and ``default`` returned."""
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
        return default
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
        import pyarrow.fs  # only for URIs: a local path needs no pyarrow at start

        try:
            pyarrow.fs.FileSystem.from_uri(raw)
        except (ValueError, OSError) as exc:  # unknown scheme, bad URI, unsupported build
            return f"SORBRANK_DATA_DIR={raw!r}: not a filesystem URI pyarrow understands ({exc})"
        return None
    path = Path(raw)
    if path.exists() and not path.is_dir():
        return f"SORBRANK_DATA_DIR={raw}: exists and is not a directory"
    return None


@dataclass(frozen=True)
class SharedSettings:
    # a local Path, or a URI string pyarrow.fs understands (Path would fold the "//")
    data_dir: Path | str = Path(DEFAULT_DATA_DIR)
    broker_url: str | None = None
    log_level: str = DEFAULT_LEVEL
    task_soft_limit_s: int = DEFAULT_TASK_SOFT_LIMIT_S
    task_hard_limit_s: int = DEFAULT_TASK_HARD_LIMIT_S
    task_max_retries: int = DEFAULT_TASK_MAX_RETRIES
    reconcile_interval_s: int = DEFAULT_RECONCILE_INTERVAL_S
    file_mode: int = DEFAULT_FILE_MODE
    min_free_bytes: int = DEFAULT_MIN_FREE_BYTES


def file_mode_problem(raw: str) -> str | None:
    """Why ``raw`` is not a usable SORBRANK_FILE_MODE (None = fine)."""
    expected = "expected octal permission bits such as 0640 or 0660"
    if not re.fullmatch(r"0?[0-7]{3}", raw):
        return f"SORBRANK_FILE_MODE={raw!r}: {expected}"
    mode = int(raw, 8)
    if mode & 0o600 != 0o600:
        return f"SORBRANK_FILE_MODE={raw}: the owner must keep read and write (0600)"
    if mode & 0o111:
        return f"SORBRANK_FILE_MODE={raw}: store files are data, never executable; {expected}"
    if mode & 0o002:
        return f"SORBRANK_FILE_MODE={raw}: world-writable store files are refused; {expected}"
    return None


def store_file_mode(env: Mapping[str, str] | None = None) -> int:
    """The permission bits for store files from SORBRANK_FILE_MODE (the default
    when unset or invalid: an invalid value already stopped the process at start)."""
    raw = (os.environ if env is None else env).get("SORBRANK_FILE_MODE", "").strip()
    return int(raw, 8) if raw and file_mode_problem(raw) is None else DEFAULT_FILE_MODE


def read_shared(env: Mapping[str, str], problems: list[str]) -> SharedSettings:
    """The shared settings from ``env``; every problem is appended to ``problems``."""
    broker = env.get("SORBRANK_BROKER_URL", "").strip() or None
    if broker and (problem := broker_url_problem(broker)):
        problems.append(problem)
    data_dir_raw = env.get("SORBRANK_DATA_DIR", "").strip() or DEFAULT_DATA_DIR
    if problem := data_dir_problem(data_dir_raw):
        problems.append(problem)
    log_level = env.get("SORBRANK_LOG_LEVEL", "").strip().upper() or DEFAULT_LEVEL
    if log_level not in LEVELS:
        problems.append(f"SORBRANK_LOG_LEVEL={log_level!r}: expected one of {', '.join(LEVELS)}")
    soft_s = env_int(env, "SORBRANK_TASK_SOFT_LIMIT_S", DEFAULT_TASK_SOFT_LIMIT_S, problems)
    hard_s = env_int(env, "SORBRANK_TASK_HARD_LIMIT_S", DEFAULT_TASK_HARD_LIMIT_S, problems)
    if hard_s <= soft_s:
        # Celery kills a chunk at the hard limit; at or below the soft one the
        # job never gets its chance to record the timeout itself
        problems.append(f"SORBRANK_TASK_HARD_LIMIT_S={hard_s} must be greater than "
                        f"SORBRANK_TASK_SOFT_LIMIT_S={soft_s}")
    file_mode_raw = env.get("SORBRANK_FILE_MODE", "").strip()
    if file_mode_raw and (problem := file_mode_problem(file_mode_raw)):
        problems.append(problem)
    return SharedSettings(
        data_dir=data_dir_raw if "://" in data_dir_raw else Path(data_dir_raw),
        broker_url=broker,
        log_level=log_level,
        task_soft_limit_s=soft_s,
        task_hard_limit_s=hard_s,
        task_max_retries=env_int(env, "SORBRANK_TASK_MAX_RETRIES", DEFAULT_TASK_MAX_RETRIES,
                                 problems, minimum=0),
        reconcile_interval_s=env_int(env, "SORBRANK_RECONCILE_INTERVAL_S",
                                     DEFAULT_RECONCILE_INTERVAL_S, problems, minimum=0),
        file_mode=store_file_mode(env),
        min_free_bytes=env_int(env, "SORBRANK_MIN_FREE_BYTES", DEFAULT_MIN_FREE_BYTES, problems,
                               minimum=0),
    )


def load_shared(env: Mapping[str, str] | None = None) -> SharedSettings:
    """The shared settings from ``env`` (default: the process environment);
    ConfigError naming every bad variable."""
    problems: list[str] = []
    settings = read_shared(os.environ if env is None else env, problems)
    if problems:
        raise ConfigError(problems)
    return settings
