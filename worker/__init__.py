"""sorbrank worker: intake, model catalogue, fit engine, metrics, store, Celery tasks.

Never imports Flask: the same code runs in a Celery worker, in the embedded
mode and behind ``sorbrank fit``.
"""
__version__ = "0.1.0"
