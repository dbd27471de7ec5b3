"""The benchmark scripts keep running (smoke tests at tiny sizes).

Only that they exit 0 and print their figure lines is checked; no time or
rate is asserted (speed is measured in benchmarks/, never in tests).
"""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pyarrow.parquet as pq

BENCH = Path(__file__).resolve().parents[2] / "benchmarks"


def run(script: str, *args: str) -> str:
    proc = subprocess.run([sys.executable, str(BENCH / script), *args],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    return proc.stdout


def test_bench_engine_prints_its_figures_per_model():
    out = run("bench_engine.py", "--n", "10", "--baseline-n", "5", "--repeats", "1")
    for word in ("engine   :", "baseline :", "ratio    :", "SSE parity", "fits/s"):
        assert word in out, out
    for model_id in ("langmuir", "dual_site_langmuir", "sips", "toth", "freundlich"):
        assert f"  {model_id} " in out, out


def test_bench_engine_all_models_against_a_reference_engine_folder():
    # the current engine (the package folder) as its own reference: exercises the before/after path
    engine_dir = Path(__file__).resolve().parents[2] / "worker" / "engine"
    out = run("bench_engine.py", "--n", "5", "--baseline-n", "2", "--repeats", "1",
              "--models", "all", "--reference-engine", str(engine_dir))
    assert "reference:" in out and "speed-up" in out, out
    assert "SSE equal to 1e-9 on 100.00%" in out, out
    assert "  dubinin_astakhov " in out, out


def test_bench_scale_runs_resumes_and_writes_results(tmp_path):
    args = ("--n", "12", "--chunk", "6", "--workers", "2", "--dir", str(tmp_path))
    out = run("bench_scale.py", *args)
    for word in ("generate :", "fit      :", "throughput:", "isotherms/s", "fits/s", "wall time:",
                 "peak RSS :", "12 isotherms in 2 chunk(s)"):
        assert word in out, out
    summaries = sorted((tmp_path / "results").glob("*.summary.parquet"))
    assert len(summaries) == 2
    assert sum(pq.read_metadata(p).num_rows for p in summaries) == 12
    assert not list(tmp_path.rglob("*.tmp"))
    # a second run finds every chunk done and redoes nothing
    again = run("bench_scale.py", *args)
    assert "12 reused" in again and "2 chunk(s) already done" in again, again


def test_bench_metrics_runs_with_its_baseline_side_by_side():
    out = run("bench_metrics.py", "--n", "60,120", "--repeats", "1", "--baseline", "HEAD")
    for word in ("batches  :", "n=     60:", "n=    120:", "summarize", "sorbent rows",
                 "| HEAD:", "ratio", "growth   :"):
        assert word in out, out


def test_bench_start_prints_the_ratio_and_the_json_shares():
    out = run("bench_start.py", "--runs", "1", "--large-n", "12", "--workers", "1")
    for word in ("machine  :", "vector extensions:", "bare   :", "fit    :", "ratio    :",
                 "x the bare interpreter", "json module:", "orjson     :", "12 isotherms"):
        assert word in out, out


def test_bench_reads_builds_a_store_and_compares_both_read_paths(tmp_path):
    out = run("bench_reads.py", "--batches", "10", "--repeats", "1", "--old-repeats", "1",
              "--build-jobs", "1", "--compaction", "--rankings", "--dir", str(tmp_path / "store"))
    for word in ("build    :", "disk     :", "sorbent record :", "plot           :",
                 "overview       :", "metrics        :", "ratio warm", "fresh    : a new sealed "
                 "batch is in the next sorbent record: yes", "compact  :", "result   : OK",
                 "the summaries of 10 batches into 1 file(s)", "rankings       : compacted cold",
                 "index/compacted cold", "old/compacted cold", "same answer: yes"):
        assert word in out, out
