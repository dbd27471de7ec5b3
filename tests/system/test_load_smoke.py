"""The load benchmark keeps working: benchmarks/bench_load.py at a tiny size.

It starts its own redis-server, two workers and a server on loopback and stops
them itself; here only its exit status (0 = nothing lost, duplicated or
refused) and its figure lines are checked. No time or rate is asserted.
"""
from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import ROOT, clean_env

pytestmark = pytest.mark.integration


def test_bench_load_runs_clean_at_a_tiny_size():
    proc = subprocess.run([sys.executable, str(Path(ROOT) / "benchmarks" / "bench_load.py"),
                           "--clients", "3", "--submissions", "3", "--timeout-s", "300"],
                          env=clean_env(), capture_output=True, text=True, timeout=600)
    out = proc.stdout
    assert proc.returncode == 0, out + proc.stderr
    for label in ("submission rate :", "POST /batches   :", "GET status      :",
                  "end-to-end      :", "rankings        :"):
        assert label in out, out
    assert "submissions     : 9 accepted of 9; refused/errors 0" in out
    assert re.search(r"p50 [\d.]+ ms  p99 [\d.]+ ms  \(n=9\)", out), out
    assert "all=true 9 rows, latest-wins 9 rows, expected 9" in out
    assert "check           : lost 0, duplicated 0" in out and "result          : OK" in out
