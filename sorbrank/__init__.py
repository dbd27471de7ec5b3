"""sorbrank: fit, select and rank isotherm models for sorbent screening.

The installed distribution holds this one package; its two halves live in
the repository's top-level folders and install as ``sorbrank.service`` (the
HTTP API, command line and client) and ``sorbrank.worker`` (intake, fitting
engine, metrics, store, Celery tasks).

For notebooks and scripts (docs/python.md):

    import sorbrank
    results = sorbrank.fit(df)              # a DataFrame, pyarrow Table, path(s) or bytes
    results.summary                         # one row per isotherm, a pandas DataFrame
    client = sorbrank.Client("http://127.0.0.1:8000")   # a running `sorbrank serve`

``fit``, ``Results`` and ``Client`` load on first use, so ``import sorbrank``
stays fast and imports neither the engine, Flask, Celery nor matplotlib.
"""
from __future__ import annotations

__version__ = "0.1.0"

_LAZY = {"fit": "sorbrank.study", "Results": "sorbrank.study", "Client": "sorbrank.service.client"}
__all__ = ["Client", "Results", "__version__", "fit"]


def __getattr__(name: str):
    module_name = _LAZY.get(name)
    if module_name is None:
        raise AttributeError(f"module 'sorbrank' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module_name), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))
