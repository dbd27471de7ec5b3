"""How fast ``sorbrank fit`` starts, and what JSON output costs on a large batch.

1. Start: medians of --runs interleaved runs, side by side in this one run,
   of the bare interpreter importing what any fit needs
   (``python -c "import numpy, scipy.optimize, pyarrow"``) and of
   ``sorbrank fit`` on a six-point file (table output); the ratio of the
   medians against the target of 2.5x.
2. JSON: ``sorbrank fit --format json`` on a synthetic batch of --large-n
   isotherms (the scale benchmark's mix, bench_scale.chunk_table), timed end
   to end (median of --large-runs), then, in this process on the same
   document, the serialisation with the json module as the command did it
   before (``json.dumps(doc, allow_nan=False, indent=1)``) against the
   command's own (``fit.json_bytes``, orjson): seconds and each one's share
   of a whole run.

The machine line names the CPU and the vector extensions numpy found (the
engine's speed depends on them; see DEVELOPERS.md). Nothing here asserts a
time.

    .venv/bin/python benchmarks/bench_start.py --runs 9 --large-n 20000
    .venv/bin/python benchmarks/bench_start.py --runs 2 --large-n 30 --large-runs 1
"""
from __future__ import annotations

import argparse
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
BARE_IMPORTS = "import numpy, scipy.optimize, pyarrow"
# pyarrow imports pandas, where installed, when it builds its first array
FIRST_ARRAY = BARE_IMPORTS + "; pyarrow.array([0])"
TARGET_RATIO = 2.5
# vector extensions worth naming, widest last (numpy's own feature names)
VECTOR_FEATURES = ("SSE42", "AVX", "FMA3", "AVX2", "AVX512F", "AVX512_SKX", "AVX512_ICL")

# an invented Tideglass-31 sorbent: six CO2 points at 298.15 K, kPa and mmol/g
SIX_POINTS = """\
sorbent_id,adsorbate,temperature_k,pressure_kpa,loading_mmol_per_g
TG31-BENCH-0001,CO2,298.15,10,0.52
TG31-BENCH-0001,CO2,298.15,20,0.95
TG31-BENCH-0001,CO2,298.15,40,1.62
TG31-BENCH-0001,CO2,298.15,60,2.10
TG31-BENCH-0001,CO2,298.15,80,2.47
TG31-BENCH-0001,CO2,298.15,100,2.76
"""


def machine_line() -> str:
    """CPU model, cores and the vector extensions numpy detected at run time."""
    model = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        from numpy._core._multiarray_umath import __cpu_features__ as features
    except ImportError:  # numpy < 2
        from numpy.core._multiarray_umath import __cpu_features__ as features
    vector = [name for name in VECTOR_FEATURES if features.get(name)]
    return (f"{model}, {os.cpu_count()} cores; vector extensions: "
            f"{', '.join(vector) or 'none of ' + ', '.join(VECTOR_FEATURES)}")


def sorbrank_command() -> list[str]:
    """The installed ``sorbrank`` script beside this interpreter, else ``-m``."""
    script = Path(sys.executable).with_name("sorbrank")
    if script.exists():
        return [str(script)]
    return [sys.executable, "-m", "sorbrank.service.cli"]


def timed_run(argv: list[str]) -> float:
    """Wall seconds of one run of ``argv``; raises if it fails."""
    start = time.perf_counter()
    proc = subprocess.run(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    elapsed = time.perf_counter() - start
    if proc.returncode != 0:
        raise SystemExit(f"failed ({proc.returncode}): {' '.join(argv)}\n{proc.stderr}")
    return elapsed


def bench_start(work: Path, runs: int) -> None:
    small = work / "six_points.csv"
    small.write_text(SIX_POINTS)
    commands = {"bare": [sys.executable, "-c", BARE_IMPORTS],
                "array": [sys.executable, "-c", FIRST_ARRAY],
                "fit": [*sorbrank_command(), "fit", str(small)]}
    for argv in commands.values():
        timed_run(argv)  # warm the file cache; not counted
    times: dict[str, list[float]] = {name: [] for name in commands}
    for _ in range(runs):  # interleaved, so drift in machine load hits all
        for name, argv in commands.items():
            times[name].append(timed_run(argv))
    bare_s, fit_s = statistics.median(times["bare"]), statistics.median(times["fit"])
    array_s = statistics.median(times["array"])
    try:
        import importlib.util
        pandas = "installed" if importlib.util.find_spec("pandas") else "not installed"
    except ValueError:
        pandas = "unknown"
    print(f"start    : medians of {runs} interleaved runs")
    print(f"  bare   : {bare_s:.3f} s  python -c \"{BARE_IMPORTS}\"  "
          f"(min {min(times['bare']):.3f}, max {max(times['bare']):.3f})")
    print(f"  array  : {array_s:.3f} s  the same and pyarrow's first array (pandas {pandas}: "
          f"pyarrow imports it then): +{array_s - bare_s:.3f} s")
    print(f"  fit    : {fit_s:.3f} s  sorbrank fit six_points.csv (table)  "
          f"(min {min(times['fit']):.3f}, max {max(times['fit']):.3f})")
    verdict = "within" if fit_s / bare_s <= TARGET_RATIO else "ABOVE"
    print(f"ratio    : {fit_s / bare_s:.2f}x the bare interpreter ({verdict} the target "
          f"of {TARGET_RATIO}x)")


def large_batch(n: int, path: Path) -> None:
    """The scale benchmark's mix, ``n`` isotherms, with unit-carrying columns."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    sys.path.insert(0, str(ROOT / "benchmarks"))
    import bench_scale

    chunk = 10_000
    pieces = []
    for k, start in enumerate(range(0, n, chunk)):
        table = bench_scale.chunk_table(k, min(chunk, n - start), start, 20261202)
        if "pressure_unit" in table.column_names:  # the Pa / mol/kg spelling of old
            table = table.drop_columns(["pressure_unit", "loading_unit"]).rename_columns(
                {"pressure": "pressure_pa", "loading": "loading_mol_per_kg"})
        pieces.append(table)
    pq.write_table(pa.concat_tables(pieces), path)


def bench_json(work: Path, n: int, runs: int, workers: int | None) -> None:
    import json

    from sorbrank.service.commands.fit import json_bytes
    from sorbrank.worker.intake import Limits, read_batch
    from sorbrank.worker.pipeline import FitOptions, process_batch

    big = work / "large.parquet"
    large_batch(n, big)
    argv = [*sorbrank_command(), "fit", str(big), "--format", "json", "--out", str(work / "large.json")]
    if workers:
        argv += ["--workers", str(workers)]
    run_s = statistics.median(timed_run(argv) for _ in range(runs))

    batch = read_batch(big, limits=Limits.for_local_files())
    doc = process_batch(batch, FitOptions(), workers=workers or os.cpu_count() or 1).to_json()
    repeats = 3
    json_s = statistics.median(_seconds(lambda: json.dumps(doc, allow_nan=False, indent=1))
                               for _ in range(repeats))
    orjson_s = statistics.median(_seconds(lambda: json_bytes(doc)) for _ in range(repeats))
    rest_s = max(run_s - orjson_s, 0.0)  # the run serialised with orjson
    size_mb = len(json_bytes(doc)) / 1e6
    print(f"json     : sorbrank fit --format json, {len(batch.isotherms)} isotherms "
          f"({size_mb:.1f} MB), median of {runs}: {run_s:.2f} s")
    print(f"  json module: {json_s:.3f} s = {json_s / (rest_s + json_s):.1%} of a run with it")
    print(f"  orjson     : {orjson_s:.3f} s = {orjson_s / run_s:.1%} of the run "
          f"({json_s / orjson_s:.1f}x faster; medians of {repeats})")


def _seconds(fn) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--runs", type=int, default=9, help="start-up runs of each command (default 9)")
    ap.add_argument("--large-n", type=int, default=200,
                    help="isotherms of the JSON batch (default 200; 20000 for the figure)")
    ap.add_argument("--large-runs", type=int, default=1, help="runs of the JSON batch (default 1)")
    ap.add_argument("--workers", type=int, default=None, help="fitting processes (default: all cores)")
    args = ap.parse_args()
    print(f"machine  : {machine_line()}")
    with tempfile.TemporaryDirectory(prefix="bench_start_") as tmp:
        work = Path(tmp)
        bench_start(work, max(args.runs, 1))
        bench_json(work, max(args.large_n, 1), max(args.large_runs, 1), args.workers)
    return 0


if __name__ == "__main__":
    sys.exit(main())
