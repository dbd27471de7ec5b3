"""Per-sorbent metrics on large batches: how their time grows with the batch.

The summary metrics (capacity, Henry, loadings, BET, site density) and the
per-sorbent rows (isosteric heat, temperature-swing working capacity, IAST)
of one batch, as ``sorbrank fit`` computes them for a whole input file.

1. For each --n, a batch of the scale benchmark's mix (bench_scale.py: CH4 /
   N2 / H2 at 273-313 K, CO2 at 273.15 / 298.15 K, N2 at 77 K; sorbents hold
   three isotherms each) is generated once as Parquet, read by intake and
   fitted (every model, AICc selection; not timed). The batch is given a
   temperature swing (adsorb at 273.15 K, desorb at 298.15 K) and two
   mixture requests for every sorbent (CO2/N2 15/85 and CH4/H2 50/50,
   1 bar, 298.15 K), so every kind of sorbent row has work to do.
2. Timed, median of --repeats: ``metrics.summarize`` and
   ``metrics.sorbent_metrics`` on that batch.
3. The same in a second process with the code of git revision --baseline
   (``git archive`` into a temp dir), side by side, and the ratios.

Printed per n: seconds for each side and baseline / current. Time growing
faster than n (compare the rows) means some step scans the batch once per
sorbent. Nothing here asserts a time.

    .venv/bin/python benchmarks/bench_metrics.py --baseline 133cad8
    .venv/bin/python benchmarks/bench_metrics.py --n 300 --repeats 1 --baseline none
"""
from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from local_procs import code_at

ROOT = Path(__file__).resolve().parents[1]
CHUNK = 10_000  # isotherms per generated piece (bench_scale.chunk_table)


def write_batch(n: int, path: Path) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    sys.path.insert(0, str(ROOT / "benchmarks"))
    import bench_scale

    pieces = [bench_scale.chunk_table(k, min(CHUNK, n - start), start, 20261202)
              for k, start in enumerate(range(0, n, CHUNK))]
    pq.write_table(pa.concat_tables(pieces), path)


def measure(paths: list[str], repeats: int) -> list[dict]:
    """In the code tree this process imports: per batch file, median seconds."""
    from sorbrank.worker import metrics
    from sorbrank.worker.intake import Limits, read_batch
    from sorbrank.worker.isotherm import Conditions, MixtureRequest
    from sorbrank.worker.pipeline import FitOptions, process_batch

    out = []
    for path in paths:
        batch = read_batch(Path(path), limits=Limits.for_local_files())
        result = process_batch(batch, FitOptions(), workers=1, chunk_size=len(batch.isotherms))
        batch.conditions = Conditions(adsorption_temperature_k=273.15, desorption_temperature_k=298.15)
        batch.mixtures = [MixtureRequest(None, ["CO2", "N2"], [0.15, 0.85], 1e5, 298.15),
                          MixtureRequest(None, ["CH4", "H2"], [0.5, 0.5], 1e5, 298.15)]
        args = (result.packed, result.fits, result.selection, batch)
        times = {"summarize": [], "sorbent_metrics": []}
        rows = 0
        for _ in range(repeats):
            for name in times:
                started = time.perf_counter()
                value = getattr(metrics, name)(*args)
                times[name].append(time.perf_counter() - started)
                if name == "sorbent_metrics":
                    rows = len(value)
        out.append({"n": len(batch.isotherms), "rows": rows,
                    **{name: statistics.median(v) for name, v in times.items()}})
    return out


def run_side(code_dir: Path, paths: list[str], repeats: int) -> list[dict]:
    """``measure`` in a fresh interpreter importing ``code_dir``'s worker package."""
    script = (f"import json, sys; sys.path.insert(0, {str(code_dir)!r}); "
              f"sys.path.insert(1, {str(ROOT / 'benchmarks')!r}); import bench_metrics; "
              f"print(json.dumps(bench_metrics.measure({paths!r}, {repeats})))")
    done = subprocess.run([sys.executable, "-c", script], cwd=code_dir, capture_output=True,
                          text=True, check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=lambda v: [int(x) for x in v.split(",")], default=[5000, 10000, 20000],
                    help="batch sizes, comma-separated (default 5000,10000,20000)")
    ap.add_argument("--repeats", type=int, default=3, help="timed repeats; medians are printed")
    ap.add_argument("--baseline", default="HEAD",
                    help="git revision whose worker/ is the baseline (default HEAD); 'none' skips it")
    args = ap.parse_args(argv)

    with tempfile.TemporaryDirectory(prefix="sorbrank-bench-metrics-") as tmp:
        tmp = Path(tmp)
        paths = []
        for n in args.n:
            path = tmp / f"batch-{n}.parquet"
            write_batch(n, path)
            paths.append(str(path))
        current = run_side(ROOT, paths, args.repeats)
        base = run_side(code_at(args.baseline, tmp / "baseline", "worker"), paths, args.repeats) \
            if args.baseline != "none" else None
    print(f"batches  : {', '.join(f'{n:,}' for n in args.n)} isotherms of the scale mix, "
          f"swing 273.15 -> 298.15 K, 2 mixture requests for every sorbent; "
          f"median of {args.repeats}")
    for k, cur in enumerate(current):
        line = (f"n={cur['n']:>7,}: summarize {cur['summarize']:7.3f} s, sorbent rows "
                f"{cur['sorbent_metrics']:7.3f} s ({cur['rows']:,} rows)")
        if base is not None:
            b = base[k]
            line += (f" | {args.baseline}: summarize {b['summarize']:7.3f} s, sorbent rows "
                     f"{b['sorbent_metrics']:7.3f} s ({b['rows']:,} rows) | ratio "
                     f"{b['summarize'] / cur['summarize']:.2f}x, "
                     f"{b['sorbent_metrics'] / cur['sorbent_metrics']:.2f}x")
        print(line)
    if len(current) > 1:
        first, last = current[0], current[-1]
        growth = last["n"] / first["n"]
        print(f"growth   : n x{growth:.1f} -> summarize x{last['summarize'] / first['summarize']:.1f}, "
              f"sorbent rows x{last['sorbent_metrics'] / first['sorbent_metrics']:.1f}"
              f" (linear would be x{growth:.1f})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
