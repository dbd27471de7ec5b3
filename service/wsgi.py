"""WSGI entry point for production servers: ``gunicorn sorbrank.service.wsgi:app``.

Importing this module builds the Flask app from the SORBRANK_* environment,
sends this process's logs to stderr as JSON lines (SORBRANK_LOG_LEVEL), checks
that the store root is writable, and does nothing else (no server, no
background threads, no broker connection: a broker that is down makes
/readyz fail, not the start).

Two rules ``sorbrank serve`` enforces from its --host are enforced here at
import instead, because a WSGI server's bind address is unknown to the app:

* distributed mode only (SORBRANK_BROKER_URL set). In embedded mode every
  gunicorn worker process would start its own fitting pool and re-run the same
  unfinished chunks at start; a single-process deployment uses
  ``sorbrank serve`` instead.
* bearer tokens are required (SORBRANK_TOKENS_FILE or SORBRANK_TOKENS) unless
  SORBRANK_ALLOW_OPEN=1, as for any non-loopback bind.

A violated rule (or an unwritable SORBRANK_DATA_DIR) raises ``ConfigError`` at
import, so gunicorn stops at start with the message instead of serving.
gunicorn's own lines (booting, worker exits) keep gunicorn's format; run it
without ``--access-logfile``, the app logs every request as JSON.
"""
from __future__ import annotations

from typing import Mapping

from flask import Flask

from sorbrank.worker import logs

from .app import create_app
from .config import ConfigError, load_settings, store_problem


def build(env: Mapping[str, str] | None = None) -> Flask:
    settings = load_settings(env)
    problems = []
    if not settings.broker_url:
        problems.append("SORBRANK_BROKER_URL is not set: sorbrank.service.wsgi:app serves distributed "
                        "mode only (each WSGI worker process would run its own fitting pool); "
                        "set it to redis://host:port/db, or run 'sorbrank serve' for embedded mode")
    if not settings.tokens and not settings.allow_open:
        problems.append("no tokens configured: set SORBRANK_TOKENS_FILE or SORBRANK_TOKENS, "
                        "or SORBRANK_ALLOW_OPEN=1 to serve without authentication")
    if not problems and (problem := store_problem(settings)):
        problems.append(problem)
    if problems:
        raise ConfigError(problems)
    logs.configure(settings.log_level)
    return create_app(settings)


app = build()
