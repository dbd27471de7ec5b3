"""Batch engine vs a per-isotherm scipy.optimize.curve_fit loop, in one run.

N synthetic isotherms (30 points each, fixed seed) are drawn from several
catalogue models with realistic noise (1 % of the largest loading, Gaussian,
plus 0.5 % multiplicative). What is fitted:

* ``--models generating`` (default): each isotherm with the model that
  generated it;
* ``--models all``: every isotherm with every catalogue model (each isotherm
  gets a saturation pressure of 1.5x its highest pressure, so the p/p0
  models apply too) -- the workload of the pipeline.

Sides, all in this one process (one core each):

* engine:    sorbrank.worker.engine.fit_model on all isotherms of a model at once;
* reference: optional (--reference-engine), another engine (an engine.py, an
             engine package folder, or a git revision's) -- e.g. the last commit's, ``--reference-engine HEAD`` -- timed interleaved
             with the current one on the same data (before/after);
* baseline:  scipy.optimize.curve_fit (trf, same bounds, same analytic
             Jacobian) per isotherm, started from the same seeds
             (model.initial_guesses, computed in the timed region on both
             sides), keeping the lowest SSE per isotherm.

The baseline may run on a random subset (--baseline-n) to save time; its rate
is then measured on that subset and said so. SSE parity: share of baseline
isotherms where engine SSE <= baseline SSE * (1 + 1e-6). Medians over
--repeats runs; no figure here is a pass/fail threshold.

    .venv/bin/python benchmarks/bench_engine.py --n 20000 --baseline-n 1000
    .venv/bin/python benchmarks/bench_engine.py --n 5000 --models all --reference-engine HEAD
"""
from __future__ import annotations

import argparse
import functools
import importlib.util
import statistics
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
from scipy import optimize

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import sorbrank.worker.engine as engine  # noqa: E402
from sorbrank.worker.isotherm import Isotherm  # noqa: E402
from sorbrank.worker.models import CATALOGUE  # noqa: E402
from sorbrank.worker.packing import pack  # noqa: E402

N_POINTS = 30
PARITY_RTOL = 1e-6
T_K = 298.15


def draw_params(model_id: str, rng) -> list[float]:
    """Plausible screening parameters (canonical units) for the generating models."""
    q_sat = rng.uniform(1.0, 10.0)
    b = 10 ** rng.uniform(-6.0, -3.0)
    if model_id == "langmuir":
        return [q_sat, b]
    if model_id == "dual_site_langmuir":
        return [0.3 * q_sat, b * 10 ** rng.uniform(1.5, 2.5), 0.7 * q_sat, b]
    if model_id == "sips":
        return [q_sat, b, rng.uniform(0.5, 1.5)]
    if model_id == "toth":
        return [q_sat, b, rng.uniform(0.4, 1.0)]
    if model_id == "freundlich":
        return [10 ** rng.uniform(-3.0, -1.0), rng.uniform(1.2, 4.0)]
    raise KeyError(model_id)


GENERATORS = ("langmuir", "dual_site_langmuir", "sips", "toth", "freundlich")


def make_isotherms(n: int, seed: int) -> dict[str, list[Isotherm]]:
    rng = np.random.default_rng(seed)
    groups: dict[str, list[Isotherm]] = {m: [] for m in GENERATORS}
    for i in range(n):
        model_id = GENERATORS[i % len(GENERATORS)]
        model = CATALOGUE[model_id]
        p_lo = 10 ** rng.uniform(0.5, 2.5)
        p = np.geomspace(p_lo, p_lo * 10 ** rng.uniform(3.0, 5.0), N_POINTS)
        params = draw_params(model_id, rng)
        q = model.evaluate(p[None], np.array([[T_K]]), *[np.array([[v]]) for v in params])[0]
        q = q * (1 + 0.005 * rng.standard_normal(p.size)) + 0.01 * q.max() * rng.standard_normal(p.size)
        groups[model_id].append(Isotherm(f"{model_id}-{i}", f"m{i}", "CO2", T_K, p, q))
    return groups


def load_reference_engine(spec: str):
    """Another engine as module ``sorbrank.worker._reference_engine`` (it then uses
    the current models). ``spec`` is a path -- an engine.py file or an engine
    package folder -- or a git revision (its worker/engine.py if it has one,
    else its worker/engine/ package)."""
    path = Path(spec)
    if not path.exists():
        path = _engine_at_revision(spec)
    name = "sorbrank.worker._reference_engine"
    if path.is_dir():
        module_spec = importlib.util.spec_from_file_location(name, path / "__init__.py",
                                                             submodule_search_locations=[str(path)])
    else:
        module_spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(module_spec)
    sys.modules[module_spec.name] = module
    module_spec.loader.exec_module(module)
    if not hasattr(module, "SolverOptions"):
        _adapt_pre_options(module)
    return module


def _engine_at_revision(rev: str) -> Path:
    """The engine of git revision ``rev`` written to a temporary file or folder."""
    git = lambda *a: subprocess.run(["git", *a], cwd=ROOT, check=True, capture_output=True,  # noqa: E731
                                    text=True).stdout
    listed = git("ls-tree", "-r", "--name-only", rev, "worker/engine.py", "worker/engine/").split()
    if "worker/engine.py" in listed:
        tmp = tempfile.NamedTemporaryFile("w", suffix="_engine.py", delete=False)
        tmp.write(git("show", f"{rev}:worker/engine.py"))
        tmp.close()
        return Path(tmp.name)
    folder = Path(tempfile.mkdtemp(suffix="_engine"))
    for name in listed:
        if name.endswith(".py"):
            (folder / Path(name).name).write_text(git("show", f"{rev}:{name}"))
    if not (folder / "__init__.py").exists():
        raise SystemExit(f"revision {rev} has neither worker/engine.py nor worker/engine/")
    return folder


def _adapt_pre_options(module) -> None:
    """An engine from before SolverOptions keeps its tolerances as module
    constants; give it the interface the pipeline calls (options accepted,
    the defaults only), so ``bench_scale.py --engine`` can run it."""
    from sorbrank.worker.engine import SolverOptions

    fit_models = module.fit_models

    def fit_models_with_options(packed, models="all", weighting="uniform", absolute_sigma=False,
                                options=None):
        if options not in (None, SolverOptions()):
            raise ValueError("this reference engine takes no SolverOptions")
        return fit_models(packed, models, weighting, absolute_sigma)

    module.SolverOptions = SolverOptions
    module.fit_models = fit_models_with_options
    if not hasattr(module, "sigma_mol_per_kg"):
        module.sigma_mol_per_kg = module._sigma_mol_per_kg


def jobs_for(groups, which: str) -> list[tuple[str, list[Isotherm]]]:
    """(model id, isotherms it is fitted to) pairs."""
    if which == "generating":
        return [(m, isos) for m, isos in groups.items()]
    everyone = [iso for isos in groups.values() for iso in isos]
    for iso in everyone:
        iso.saturation_pressure_pa = 1.5 * float(iso.pressure_pa.max())
    return [(m, everyone) for m in CATALOGUE]


CLOCKS = {"wall": time.perf_counter, "cpu": time.process_time}
clock = time.perf_counter


def time_engine(fit_model, jobs, packed) -> tuple[list[float], dict, dict, dict]:
    times, sse, conv, fits_by_model = [], {}, {}, {}
    for (model_id, _), pk in zip(jobs, packed):
        start = clock()
        fits = fit_model(CATALOGUE[model_id], pk)
        times.append(clock() - start)
        sse[model_id], conv[model_id] = fits.sse, fits.converged
        fits_by_model[model_id] = fits
    return times, sse, conv, fits_by_model


def selection_parity(cur: dict, ref: dict, rtol: float = 1e-9) -> tuple[np.ndarray, np.ndarray]:
    """Per isotherm: (same selection, same answer). The answer is the same when
    both engines select the same model (or none) and its parameters agree to
    ``rtol`` or its SSE does. Only meaningful when every model saw the same
    isotherms (--models all)."""
    from sorbrank.worker.selection import select

    a, b = select(cur), select(ref)
    same_model = a.best == b.best
    same = same_model.copy()
    for i in np.flatnonzero(same_model & (a.best != None)):  # noqa: E711 - object array
        fa, fb = cur[a.best[i]], ref[b.best[i]]
        same[i] = bool(np.allclose(fa.params[i], fb.params[i], rtol=rtol, atol=0)
                       or np.isclose(fa.sse[i], fb.sse[i], rtol=rtol, atol=0))
    return same_model, same


def run_baseline(jobs, subset) -> tuple[list[float], dict[str, np.ndarray]]:
    times, out = [], {}
    for model_id, isos in jobs:
        start = clock()
        model = CATALOGUE[model_id]
        chosen = [isos[i] for i in subset[model_id]]
        if not chosen:
            out[model_id] = np.zeros(0)
            times.append(0.0)
            continue
        packed = pack(chosen)
        x_all = packed.relative_pressure if model.relative_pressure else packed.pressure_pa
        seeds = model.clip_to_bounds(model.initial_guesses(
            x_all, packed.loading_mol_per_kg, packed.mask, packed.temperature_k[:, None]))
        bounds = (model.lower_bounds(), model.upper_bounds())
        best = np.full(len(chosen), np.inf)
        for i, iso in enumerate(chosen):
            x = x_all[i, :iso.n_points]
            q = iso.loading_mol_per_kg
            t = np.full((1, 1), iso.temperature_k)

            def f(xx, *b):
                return np.broadcast_to(model.evaluate(xx[None], t, *[np.array([[v]]) for v in b]),
                                       (1, xx.size))[0]

            def jac(xx, *b):
                cols = model.jacobian(xx[None], t, *[np.array([[v]]) for v in b])
                return np.stack([np.broadcast_to(c, (1, xx.size))[0] for c in cols], axis=1)

            for s in range(seeds.shape[0]):
                try:
                    with warnings.catch_warnings(), np.errstate(all="ignore"):
                        warnings.simplefilter("ignore")
                        b, _ = optimize.curve_fit(f, x, q, p0=seeds[s, i], bounds=bounds, jac=jac,
                                                  method="trf")
                        value = float(np.sum((f(x, *b) - q) ** 2))
                    if np.isfinite(value):
                        best[i] = min(best[i], value)
                except (RuntimeError, ValueError):
                    pass  # this seed failed; another may not
        out[model_id] = best
        times.append(clock() - start)
    return times, out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=20_000, help="isotherms for the engine (default 20000)")
    ap.add_argument("--baseline-n", type=int, default=1_000,
                    help="random subset fitted by the curve_fit loop (default 1000)")
    ap.add_argument("--repeats", type=int, default=3, help="engine repeats; medians are reported")
    ap.add_argument("--seed", type=int, default=20260512)
    ap.add_argument("--models", choices=("generating", "all"), default="generating",
                    help="fit each isotherm with its generating model, or with every model")
    ap.add_argument("--reference-engine", metavar="FILE|REV", default=None,
                    help="also time this engine (an engine.py or engine/ folder, or a git revision such as HEAD)")
    ap.add_argument("--block", type=int, default=None,
                    help=f"engine working-set rows (default {engine.SolverOptions().row_block})")
    ap.add_argument("--clock", choices=tuple(CLOCKS), default="wall",
                    help="wall time, or this process's CPU time (steadier on a shared, loaded machine)")
    args = ap.parse_args(argv)
    global clock
    clock = CLOCKS[args.clock]
    solver = engine.SolverOptions(row_block=args.block) if args.block else engine.SolverOptions()
    fit_current = functools.partial(engine.fit_model, options=solver)

    groups = make_isotherms(args.n, args.seed)
    jobs = jobs_for(groups, args.models)
    packed = [pack(isos) for _, isos in jobs]
    reference = load_reference_engine(args.reference_engine) if args.reference_engine else None
    rng = np.random.default_rng(args.seed + 1)
    share = min(1.0, args.baseline_n / max(args.n, 1))
    subset = {m: np.sort(rng.choice(len(isos), size=int(round(share * len(isos))), replace=False))
              for m, isos in jobs}
    n_fits = sum(len(isos) for _, isos in jobs)
    n_base = sum(len(s) for s in subset.values())

    cur_runs, ref_runs = [], []
    for _ in range(max(args.repeats, 1)):  # interleaved, so drift in machine load hits both
        times, sse, conv, cur_fits = time_engine(fit_current, jobs, packed)
        cur_runs.append(times)
        if reference is not None:
            ref_times, ref_sse, ref_conv, ref_fits = time_engine(reference.fit_model, jobs, packed)
            ref_runs.append(ref_times)
    base_times, base_sse = run_baseline(jobs, subset)

    per_model = lambda runs: [statistics.median(r[j] for r in runs) for j in range(len(jobs))]  # noqa: E731
    cur_med = per_model(cur_runs)
    totals = [sum(r) for r in cur_runs]
    engine_rate = n_fits / statistics.median(totals)
    base_total = sum(base_times)
    base_rate = n_base / base_total if n_base else float("nan")
    eng_on_subset = np.concatenate([sse[m][subset[m]] for m, _ in jobs])
    ref = np.concatenate([base_sse[m] for m, _ in jobs])
    parity = eng_on_subset <= ref * (1 + PARITY_RTOL)
    better = eng_on_subset < ref * (1 - PARITY_RTOL)
    converged = np.concatenate([conv[m] for m, _ in jobs])

    names = [m for m, _ in jobs]
    print(f"isotherms: {args.n} ({N_POINTS} points, generated by: {', '.join(GENERATORS)}), "
          f"seed {args.seed}; models fitted: {args.models} ({len(jobs)}), {n_fits} isotherm-model fits")
    print(f"clock    : {args.clock} time")
    print(f"engine   : median {statistics.median(totals):.3f} s over {len(totals)} run(s) "
          f"[{', '.join(f'{t:.3f}' for t in totals)}] -> {engine_rate:,.0f} fits/s, "
          f"converged {converged.mean():.2%} (row block {solver.row_block})")
    if reference is not None:
        ref_totals = [sum(r) for r in ref_runs]
        print(f"reference: {args.reference_engine}: median {statistics.median(ref_totals):.3f} s "
              f"[{', '.join(f'{t:.3f}' for t in ref_totals)}] -> {n_fits / statistics.median(ref_totals):,.0f} "
              f"fits/s; speed-up {statistics.median(ref_totals) / statistics.median(totals):.2f}x")
        same = np.concatenate([np.isclose(sse[m], ref_sse[m], rtol=1e-9, equal_nan=True) for m in names])
        ref_ok = np.concatenate([ref_conv[m] for m in names])
        both = np.concatenate([conv[m] == ref_conv[m] for m in names])
        print(f"reference: SSE equal to 1e-9 on {same.mean():.2%} of isotherm-model fits, on "
              f"{same[ref_ok].mean():.2%} of those the reference converged; converged flag agrees on "
              f"{both.mean():.2%}")
        if args.models == "all":
            same_model, same_answer = selection_parity(cur_fits, ref_fits)
            print(f"reference: AICc selection: same model on {same_model.mean():.3%} of {same_model.size} "
                  f"isotherms, same model and parameters (or SSE) to 1e-9 on {same_answer.mean():.3%}")
    note = "" if n_base == n_fits else f" (random subset of {n_base} isotherm-model fits, measured once)"
    print(f"baseline : scipy.optimize.curve_fit loop {base_total:.3f} s for {n_base} fits{note} "
          f"-> {base_rate:,.1f} fits/s")
    print(f"ratio    : {engine_rate / base_rate:,.1f}x (engine fits/s / baseline fits/s)")
    print(f"SSE parity (engine <= baseline x (1 + {PARITY_RTOL:g})): {parity.mean():.2%} of {n_base}; "
          f"engine strictly better on {better.mean():.2%}")
    if reference is not None:
        ref_sub = np.concatenate([ref_sse[m][subset[m]] for m, _ in jobs])
        print(f"SSE parity of the reference engine, same subset: {(ref_sub <= ref * (1 + PARITY_RTOL)).mean():.2%}")
    ref_med = per_model(ref_runs) if reference is not None else None
    for j, (m, isos) in enumerate(jobs):
        rate = len(isos) / cur_med[j] if cur_med[j] > 0 else float("nan")
        line = f"  {m:22s} engine {cur_med[j]:7.3f} s {rate:10,.0f} fits/s"
        if ref_med is not None:
            line += f" | reference {ref_med[j]:7.3f} s, speed-up {ref_med[j] / cur_med[j]:5.2f}x"
        if len(subset[m]):
            b_rate = len(subset[m]) / base_times[j]
            ok = sse[m][subset[m]] <= base_sse[m] * (1 + PARITY_RTOL)
            line += (f" | curve_fit {b_rate:8,.1f} fits/s, ratio {rate / b_rate:7,.1f}x, "
                     f"parity {ok.mean():.2%} of {ok.size}")
        print(line)
    worst = np.argsort(-(eng_on_subset / ref))[:3]
    for i in worst:
        if not parity[i]:
            print(f"  worse case: engine SSE {eng_on_subset[i]:.6g} vs baseline {ref[i]:.6g}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
