"""One settings parser for the API and the Celery app: the same environment
gives the same values, or the same refusal, in both.

The Celery app reads its settings when it is imported, so each case imports it
in a fresh interpreter with exactly the environment under test.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

from sorbrank.service.config import ConfigError, load_settings

# prints what the Celery app configured itself with, as JSON
CELERY_PROBE = """
import json
from sorbrank.worker import celery_app, tasks
conf = celery_app.app.conf
print(json.dumps({
    "task_soft_limit_s": conf.task_soft_time_limit,
    "task_hard_limit_s": conf.task_time_limit,
    "task_max_retries": tasks.fit_chunk.max_retries,
    "reconcile_interval_s": tasks.RECONCILE_INTERVAL_S,
    "broker_url": celery_app.SETTINGS.broker_url,
    "data_dir": celery_app.data_dir(),
    "log_level": celery_app.SETTINGS.log_level,
    "visibility_timeout_s": conf.broker_transport_options["visibility_timeout"],
}))
"""


def celery_app_in(env: dict[str, str]) -> subprocess.CompletedProcess:
    """Import the Celery app in a fresh interpreter whose only SORBRANK_* variables are ``env``."""
    base = {k: v for k, v in os.environ.items() if not k.startswith("SORBRANK_")}
    return subprocess.run([sys.executable, "-c", CELERY_PROBE], env={**base, **env},
                          capture_output=True, text=True, timeout=120)


def api_problems(env: dict[str, str]) -> list[str]:
    with pytest.raises(ConfigError) as err:
        load_settings(env)
    return err.value.problems


GOOD = [
    {},
    {"SORBRANK_TASK_SOFT_LIMIT_S": "60", "SORBRANK_TASK_HARD_LIMIT_S": "90",
     "SORBRANK_TASK_MAX_RETRIES": "0", "SORBRANK_RECONCILE_INTERVAL_S": "0",
     "SORBRANK_BROKER_URL": "redis://127.0.0.1:6399/3", "SORBRANK_LOG_LEVEL": "warning"},
    {"SORBRANK_TASK_SOFT_LIMIT_S": " 1799 ", "SORBRANK_DATA_DIR": "file:///srv/sorbrank"},
]


@pytest.mark.parametrize("env", GOOD, ids=["defaults", "all-set", "spaces-and-uri"])
def test_good_settings_are_equal_in_the_api_and_the_celery_app(env, tmp_path):
    env = {"SORBRANK_DATA_DIR": str(tmp_path / "store"), **env}
    api = load_settings(env)
    done = celery_app_in(env)
    assert done.returncode == 0, done.stderr
    celery = json.loads(done.stdout.strip().splitlines()[-1])
    for name in ("task_soft_limit_s", "task_hard_limit_s", "task_max_retries",
                 "reconcile_interval_s", "broker_url", "log_level"):
        assert celery[name] == getattr(api, name), name
    assert celery["data_dir"] == str(api.data_dir)
    # Redis must not re-deliver a chunk that is still within its hard limit
    assert celery["visibility_timeout_s"] > api.task_hard_limit_s


def test_documented_defaults():
    # docs/operations.md "Configuration": 1500, 1800, 2; reconcile every 60 s
    settings = load_settings({})
    assert (settings.task_soft_limit_s, settings.task_hard_limit_s, settings.task_max_retries,
            settings.reconcile_interval_s) == (1500, 1800, 2, 60)


BAD = {
    # the old Celery parser raised this hard limit to soft + 1 without a word
    "hard-below-soft": ({"SORBRANK_TASK_SOFT_LIMIT_S": "60", "SORBRANK_TASK_HARD_LIMIT_S": "30"},
                        ["SORBRANK_TASK_HARD_LIMIT_S=30", "SORBRANK_TASK_SOFT_LIMIT_S=60"]),
    "hard-equal-soft": ({"SORBRANK_TASK_SOFT_LIMIT_S": "120", "SORBRANK_TASK_HARD_LIMIT_S": "120"},
                        ["SORBRANK_TASK_HARD_LIMIT_S=120", "SORBRANK_TASK_SOFT_LIMIT_S=120"]),
    # a soft limit above the documented default hard limit needs the hard one set too
    "soft-above-default-hard": ({"SORBRANK_TASK_SOFT_LIMIT_S": "2000"},
                                ["SORBRANK_TASK_HARD_LIMIT_S=1800", "SORBRANK_TASK_SOFT_LIMIT_S=2000"]),
    "not-a-number": ({"SORBRANK_TASK_MAX_RETRIES": "two"}, ["SORBRANK_TASK_MAX_RETRIES='two'"]),
    "negative-retries": ({"SORBRANK_TASK_MAX_RETRIES": "-1"}, ["SORBRANK_TASK_MAX_RETRIES=-1"]),
    "zero-soft-limit": ({"SORBRANK_TASK_SOFT_LIMIT_S": "0"}, ["SORBRANK_TASK_SOFT_LIMIT_S=0"]),
    "bad-reconcile": ({"SORBRANK_RECONCILE_INTERVAL_S": "1.5"}, ["SORBRANK_RECONCILE_INTERVAL_S"]),
    "bad-broker": ({"SORBRANK_BROKER_URL": "amqp://guest:secret@h/"}, ["SORBRANK_BROKER_URL"]),
    "bad-log-level": ({"SORBRANK_LOG_LEVEL": "loud"}, ["SORBRANK_LOG_LEVEL='LOUD'"]),
    "bad-data-dir": ({"SORBRANK_DATA_DIR": "nosuchscheme://x/y"}, ["SORBRANK_DATA_DIR"]),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_settings_are_refused_by_both_with_the_same_message(case, tmp_path):
    env, named = BAD[case]
    env = {"SORBRANK_DATA_DIR": str(tmp_path / "store"), **env}
    problems = api_problems(env)
    done = celery_app_in(env)
    assert done.returncode != 0, f"the Celery app accepted {env}: {done.stdout}"
    for problem in problems:
        assert problem in done.stderr
    message = "\n".join(problems)
    for text in named:
        assert text in message
    assert "Traceback" not in done.stderr
    assert "secret" not in done.stderr  # a broker password is never printed


def test_every_problem_is_reported_together():
    problems = api_problems({"SORBRANK_TASK_SOFT_LIMIT_S": "soon", "SORBRANK_TASK_MAX_RETRIES": "-3",
                             "SORBRANK_LOG_LEVEL": "chatty", "SORBRANK_DATA_DIR": "./data"})
    assert len(problems) == 3
