"""Exceptions that end a whole job: the fit path's broad handlers let them pass.

The engine and the metrics catch broad errors so that one broken model or one
figure cannot sink a batch. A time limit is not such an error: it must end the
job (retried, then failed), never turn into "model failed" fit results. Celery
raises its soft time limit as ``SoftTimeLimitExceeded``, an ``Exception``
subclass that ``except Exception`` would swallow, so the Celery task module
registers it here at import; the fit path, which knows nothing of Celery, asks
``ends_job`` first in each broad handler and re-raises.
"""
from __future__ import annotations

_job_ending: tuple[type[BaseException], ...] = ()


def register_job_ending(exc_type: type[BaseException]) -> None:
    """Make ``exc_type`` pass through every broad handler on the fit path."""
    global _job_ending
    if exc_type not in _job_ending:
        _job_ending = (*_job_ending, exc_type)


def ends_job(exc: BaseException) -> bool:
    """True when ``exc`` must end the job rather than count as one failed fit."""
    return isinstance(exc, _job_ending)
