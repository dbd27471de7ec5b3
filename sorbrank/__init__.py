"""sorbrank: fit, select and rank isotherm models for sorbent screening.

The installed distribution holds this one package; its two halves live in
the repository's top-level folders and install as ``sorbrank.service`` (the
HTTP API, command line and client) and ``sorbrank.worker`` (intake, fitting
engine, metrics, store, Celery tasks).
"""
from __future__ import annotations

__version__ = "0.1.0"
