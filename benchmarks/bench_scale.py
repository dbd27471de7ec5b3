"""End-to-end scale run: N synthetic isotherms through the sorbrank fit pipeline.

1. Generate N isotherms of 30 points as Parquet chunk files (one row per
   point, the documented input columns), streamed chunk by chunk: memory does
   not grow with N. The mix (fixed seed; noise 1 % of the largest loading,
   Gaussian, plus 0.5 % multiplicative; loadings kept positive):
     70 % CH4 / N2 / H2 at 273-313 K (supercritical: no p0, so the p/p0 models
          do not apply), drawn from Langmuir, dual-site Langmuir, Sips, Toth,
          Freundlich;
     15 % CO2 at 273.15 / 298.15 K up to 0.9 p0 (p0 from the property table,
          as intake does), same generating models -- every model applies;
     15 % N2 at 77.35 K, p/p0 0.001..0.9, drawn from BET, GAB,
          Dubinin-Astakhov -- every model applies.
   Sorbents hold three isotherms each (three temperatures of one gas, or
   three N2 runs), so the per-sorbent metrics have work to do.
2. Fit every chunk exactly as ``sorbrank fit`` does -- sorbrank.worker.intake.read_batch
   with the command's local limits, then sorbrank.worker.pipeline.process_batch (every
   catalogue model that applies, AICc selection, metrics) -- one chunk per
   task on a process pool over all cores, writing the summary and the
   per-model fit tables as Parquet per chunk (temp file + rename).
3. Resumable: a chunk whose input file exists is not generated again, a
   chunk whose summary file exists is not fitted again (--fresh starts over).

``--engine FILE|REV`` fits with another engine (e.g. ``HEAD``, the last
commit's) for a before/after on the same machine; use a separate --dir (or
--fresh) for each engine, since finished chunks are not fitted again.

Printed: wall time per phase, isotherm-model fits/s, isotherms/s, and peak
RSS (resource.getrusage: this process, and the largest child). Targets the
project reports against: 1,000,000 isotherms in <= 10 min with peak RSS
<= 4 GB on a 2-core machine. Nothing here asserts a time.

    .venv/bin/python benchmarks/bench_scale.py --n 20000
"""
from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import resource
import shutil
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

N_POINTS = 30
GAS_MODELS = ("langmuir", "dual_site_langmuir", "sips", "toth", "freundlich")
VAPOUR_MODELS = ("bet", "gab", "dubinin_astakhov")
N2_BOILING_K = 77.35


# --------------------------------------------------------------------------
# data

def _gas_params(model_id: str, rng, n: int) -> list[np.ndarray]:
    """Parameter columns (n, 1) for a generating model, canonical units."""
    q_sat = rng.uniform(1.0, 10.0, (n, 1))
    b = 10 ** rng.uniform(-6.0, -3.0, (n, 1))
    if model_id == "langmuir":
        return [q_sat, b]
    if model_id == "dual_site_langmuir":
        return [0.3 * q_sat, b * 10 ** rng.uniform(1.5, 2.5, (n, 1)), 0.7 * q_sat, b]
    if model_id == "sips":
        return [q_sat, b, rng.uniform(0.5, 1.5, (n, 1))]
    if model_id == "toth":
        return [q_sat, b, rng.uniform(0.4, 1.0, (n, 1))]
    if model_id == "freundlich":
        return [10 ** rng.uniform(-3.0, -1.0, (n, 1)), rng.uniform(1.2, 4.0, (n, 1))]
    if model_id == "bet":
        return [rng.uniform(1.0, 10.0, (n, 1)), 10 ** rng.uniform(1.0, 3.0, (n, 1))]
    if model_id == "gab":
        return [rng.uniform(1.0, 10.0, (n, 1)), 10 ** rng.uniform(1.0, 3.0, (n, 1)),
                rng.uniform(0.6, 0.95, (n, 1))]
    if model_id == "dubinin_astakhov":
        return [rng.uniform(1.0, 15.0, (n, 1)), rng.uniform(3e3, 2e4, (n, 1)), rng.uniform(1.5, 3.5, (n, 1))]
    raise KeyError(model_id)


def chunk_table(index: int, size: int, start: int, seed: int):
    """Chunk ``index`` (isotherms start .. start+size-1) as a long pyarrow Table."""
    import pyarrow as pa

    from sorbrank.worker import adsorbates
    from sorbrank.worker.models import CATALOGUE

    rng = np.random.default_rng([seed, index])
    n_mat = -(-size // 3)
    kind = rng.choice(3, size=n_mat, p=[0.70, 0.15, 0.15])   # per sorbent: gas, CO2, N2 vapour
    kind = np.repeat(kind, 3)[:size]
    member = np.tile(np.arange(3), n_mat)[:size]            # isotherm number within its sorbent
    mat = start // 3 + np.arange(size) // 3
    gas_names = np.array(["CH4", "N2", "H2"])[rng.integers(0, 3, n_mat)].repeat(3)[:size]
    t = np.where(kind == 0, np.array([273.15, 298.15, 313.15])[member],
                 np.where(kind == 1, np.array([273.15, 298.15, 283.15])[member], N2_BOILING_K))
    ads = np.where(kind == 0, gas_names, np.where(kind == 1, "CO2", "N2"))

    pressure = np.empty((size, N_POINTS))
    loading = np.empty((size, N_POINTS))
    grid = np.linspace(0.0, 1.0, N_POINTS)[None]
    # pressures
    gas = kind == 0
    p_lo = 10 ** rng.uniform(0.5, 2.5, (size, 1))
    span = 10 ** rng.uniform(3.0, 4.5, (size, 1))
    p_gas = p_lo * span ** grid
    p_gas = np.minimum(p_gas, 1e7)
    p0_co2 = np.array([adsorbates.saturation_pressure_pa("CO2", tt) or np.nan for tt in (273.15, 298.15, 283.15)])
    p0 = np.where(kind == 1, p0_co2[member], np.where(kind == 2, adsorbates.saturation_pressure_pa(
        "N2", N2_BOILING_K) or 101325.0, np.nan))
    co2_hi = 0.9 * p0[:, None]
    p_co2 = np.minimum(p_lo * (co2_hi / p_lo) ** grid, co2_hi)
    x_vap = 10 ** (-3.0 + np.log10(0.9 / 1e-3) * grid) * np.ones((size, 1))
    pressure[:] = np.where(gas[:, None], p_gas, np.where((kind == 1)[:, None], p_co2, x_vap * p0[:, None]))
    # loadings from the generating models
    model_of = np.empty(size, dtype=object)
    gen_gas = rng.integers(0, len(GAS_MODELS), size)
    gen_vap = rng.integers(0, len(VAPOUR_MODELS), size)
    for kind_value, names, pick in ((0, GAS_MODELS, gen_gas), (1, GAS_MODELS, gen_gas),
                                    (2, VAPOUR_MODELS, gen_vap)):
        for j, model_id in enumerate(names):
            rows = np.flatnonzero((kind == kind_value) & (pick == j))
            if rows.size == 0:
                continue
            model = CATALOGUE[model_id]
            x = pressure[rows] / p0[rows, None] if model.relative_pressure else pressure[rows]
            with np.errstate(all="ignore"):
                q = model.evaluate(x, t[rows, None], *_gas_params(model_id, rng, rows.size))
            loading[rows] = q
            model_of[rows] = model_id
    noise = rng.standard_normal((size, N_POINTS))
    q_max = np.abs(loading).max(axis=1, keepdims=True)
    loading = loading * (1 + 0.005 * rng.standard_normal((size, N_POINTS))) + 0.01 * q_max * noise
    loading = np.maximum(np.abs(loading), 1e-6 * q_max)

    iso_ids = np.array([f"iso{start + i}-{model_of[i]}" for i in range(size)])
    mat_ids = np.array([f"mat{m}" for m in mat])
    rep = lambda v: np.repeat(v, N_POINTS)  # noqa: E731
    return pa.table({
        "isotherm_id": pa.array(rep(iso_ids), pa.string()),
        "sorbent_id": pa.array(rep(mat_ids), pa.string()),
        "adsorbate": pa.array(rep(ads), pa.string()),
        "temperature_k": pa.array(rep(t), pa.float64()),
        "pressure_pa": pa.array(pressure.ravel(), pa.float64()),
        "loading_mol_per_kg": pa.array(loading.ravel(), pa.float64()),
    })


def _write_atomic(table, path: Path) -> None:
    import pyarrow.parquet as pq

    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    pq.write_table(table, tmp)
    os.replace(tmp, path)


def generate_chunk(job) -> int:
    index, size, start, seed, path = job
    path = Path(path)
    if path.exists():
        return 0
    _write_atomic(chunk_table(index, size, start, seed), path)
    return size


# --------------------------------------------------------------------------
# fitting: the same calls as ``sorbrank fit``

def fit_chunk(job) -> dict:
    in_path, out_dir = Path(job[0]), Path(job[1])
    summary_path = out_dir / f"{in_path.stem}.summary.parquet"
    if summary_path.exists():
        return {"skipped": 1}
    from sorbrank.worker.intake import Limits, read_batch
    from sorbrank.worker.pipeline import FitOptions, process_batch

    start = time.perf_counter()
    limits = Limits.for_local_files()
    batch = read_batch(in_path, limits=limits)
    t_read = time.perf_counter() - start
    n = len(batch.isotherms)
    result = process_batch(batch, FitOptions(), workers=1, chunk_size=max(n, 1))
    t_fit = time.perf_counter() - start - t_read
    _write_atomic(result.fits_table(), out_dir / f"{in_path.stem}.fits.parquet")
    _write_atomic(result.summary_table(), summary_path)  # written last: marks the chunk done
    fits = sum(int(np.sum(f.applicable & (f.reason != f"too few points: need at least {f.n_params + 1}")))
               for f in result.fits.values())
    return {"isotherms": n, "rejected": len(batch.rejected), "fits": fits,
            "selected": int(sum(b is not None for b in result.selection.best)),
            "t_read": t_read, "t_fit": t_fit, "t_write": time.perf_counter() - start - t_read - t_fit,
            "skipped": 0}


def _max_rss_mb(who) -> float:
    return resource.getrusage(who).ru_maxrss / 1024.0  # Linux: kilobytes


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=1_000_000, help="isotherms (default 1000000)")
    ap.add_argument("--chunk", type=int, default=10_000, help="isotherms per chunk file (default 10000)")
    ap.add_argument("--workers", type=int, default=os.cpu_count() or 1, help="processes (default: all cores)")
    ap.add_argument("--dir", type=Path, default=None,
                    help="working directory (default: <tmp>/sorbrank-scale-N); reused to resume")
    ap.add_argument("--seed", type=int, default=20260512)
    ap.add_argument("--fresh", action="store_true", help="delete the working directory first")
    ap.add_argument("--engine", metavar="FILE|REV", default=None,
                    help="fit with this engine instead (an engine.py or engine/ folder, or a git revision such as HEAD)")
    args = ap.parse_args(argv)
    if args.engine:
        # installed before the worker processes fork, so their pipeline imports it
        from bench_engine import load_reference_engine
        sys.modules["sorbrank.worker.engine"] = load_reference_engine(args.engine)

    work = args.dir or Path(os.environ.get("TMPDIR", "/tmp")) / f"sorbrank-scale-{args.n}"
    if args.fresh and work.exists():
        shutil.rmtree(work)
    in_dir, out_dir = work / "input", work / "results"
    in_dir.mkdir(parents=True, exist_ok=True)
    out_dir.mkdir(parents=True, exist_ok=True)
    chunk = max(1, args.chunk)
    jobs = [(i, min(chunk, args.n - s), s, args.seed, str(in_dir / f"chunk{i:06d}.parquet"))
            for i, s in enumerate(range(0, args.n, chunk))]

    ctx = mp.get_context("fork")
    wall = time.perf_counter()
    with ctx.Pool(args.workers, maxtasksperchild=50) as pool:
        generated = sum(pool.imap_unordered(generate_chunk, jobs))
        t_gen = time.perf_counter() - wall
        fit_start = time.perf_counter()
        stats = list(pool.imap_unordered(fit_chunk, [(j[4], str(out_dir)) for j in jobs]))
        pool.close()
        pool.join()
    t_fit = time.perf_counter() - fit_start
    t_wall = time.perf_counter() - wall

    done = [s for s in stats if not s["skipped"]]
    n_iso = sum(s["isotherms"] for s in done)
    n_fits = sum(s["fits"] for s in done)
    print(f"scale run: {args.n} isotherms x {N_POINTS} points in {len(jobs)} chunk(s) of <= {chunk}, "
          f"{args.workers} worker process(es), directory {work}, engine {args.engine or 'worker/engine/'}")
    print(f"generate : {t_gen:.2f} s ({generated} isotherms written, {args.n - generated} reused)")
    print(f"fit      : {t_fit:.2f} s for {n_iso} isotherms in {len(done)} chunk(s) "
          f"({len(stats) - len(done)} chunk(s) already done); rejected at intake "
          f"{sum(s['rejected'] for s in done)}, with a selected model {sum(s['selected'] for s in done)}")
    if done:
        cpu = {k: sum(s[k] for s in done) for k in ("t_read", "t_fit", "t_write")}
        total_cpu = sum(cpu.values()) or 1.0
        print(f"  per-chunk time summed over workers: intake {cpu['t_read']:.1f} s "
              f"({cpu['t_read'] / total_cpu:.0%}), fit+select+metrics {cpu['t_fit']:.1f} s "
              f"({cpu['t_fit'] / total_cpu:.0%}), write {cpu['t_write']:.1f} s ({cpu['t_write'] / total_cpu:.0%})")
    rate_iso = n_iso / t_fit if t_fit > 0 else float("nan")
    rate_fits = n_fits / t_fit if t_fit > 0 else float("nan")
    print(f"throughput: {rate_iso:,.0f} isotherms/s, {rate_fits:,.0f} isotherm-model fits/s "
          f"({n_fits} fits where the model applies), fit phase")
    print(f"wall time: {t_wall:.2f} s (generate + fit)")
    parent, child = _max_rss_mb(resource.RUSAGE_SELF), _max_rss_mb(resource.RUSAGE_CHILDREN)
    print(f"peak RSS : this process {parent:,.0f} MB, largest child {child:,.0f} MB; "
          f"bound for all at once {parent + args.workers * child:,.0f} MB")
    if n_iso and rate_iso > 0 and n_iso < 1_000_000:
        print(f"at this rate 1,000,000 isotherms take {1e6 / rate_iso / 60:.1f} min to fit "
              f"(linear extrapolation of this run, not a measurement)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
