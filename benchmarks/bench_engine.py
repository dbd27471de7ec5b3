"""Batch engine vs a per-isotherm scipy.optimize.curve_fit loop, in one run.

N synthetic isotherms (30 points each, fixed seed) are drawn from several
catalogue models with realistic noise (1 % of the largest loading, Gaussian,
plus 0.5 % multiplicative). Each isotherm is fitted with the model that
generated it:

* engine:   worker.engine.fit_model on all isotherms of a model at once
            (one process, so both sides use one core);
* baseline: scipy.optimize.curve_fit (trf, same bounds, same analytic
            Jacobian) per isotherm, started from the same seeds
            (model.initial_guesses, computed in the timed region on both
            sides), keeping the lowest SSE per isotherm.

The baseline may run on a random subset (--baseline-n) to save time; its rate
is then measured on that subset and said so. SSE parity: share of baseline
isotherms where engine SSE <= baseline SSE * (1 + 1e-6).

    .venv/bin/python benchmarks/bench_engine.py --n 20000 --baseline-n 1000
"""
from __future__ import annotations

import argparse
import statistics
import sys
import time
import warnings
from pathlib import Path

import numpy as np
from scipy import optimize

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from worker.engine import fit_model  # noqa: E402
from worker.isotherm import Isotherm  # noqa: E402
from worker.models import CATALOGUE  # noqa: E402
from worker.packing import pack  # noqa: E402

N_POINTS = 30
PARITY_RTOL = 1e-6


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
        q = model.evaluate(p[None], np.array([[298.15]]), *[np.array([[v]]) for v in params])[0]
        q = q * (1 + 0.005 * rng.standard_normal(p.size)) + 0.01 * q.max() * rng.standard_normal(p.size)
        groups[model_id].append(Isotherm(f"{model_id}-{i}", f"m{i}", "CO2", 298.15, p, q))
    return groups


def run_engine(groups) -> tuple[float, dict[str, np.ndarray], dict[str, np.ndarray]]:
    start = time.perf_counter()
    sse, conv = {}, {}
    for model_id, isos in groups.items():
        fits = fit_model(CATALOGUE[model_id], pack(isos))
        sse[model_id], conv[model_id] = fits.sse, fits.converged
    return time.perf_counter() - start, sse, conv


def run_baseline(groups, subset: dict[str, np.ndarray]) -> tuple[float, dict[str, np.ndarray]]:
    start = time.perf_counter()
    out = {}
    for model_id, isos in groups.items():
        model = CATALOGUE[model_id]
        chosen = [isos[i] for i in subset[model_id]]
        if not chosen:
            out[model_id] = np.zeros(0)
            continue
        packed = pack(chosen)
        seeds = model.clip_to_bounds(model.initial_guesses(
            packed.pressure_pa, packed.loading_mol_per_kg, packed.mask, packed.temperature_k[:, None]))
        bounds = (model.lower_bounds(), model.upper_bounds())
        best = np.full(len(chosen), np.inf)
        for i, iso in enumerate(chosen):
            p, q = iso.pressure_pa, iso.loading_mol_per_kg
            t = np.full((1, 1), iso.temperature_k)

            def f(x, *b):
                return model.evaluate(x[None], t, *[np.array([[v]]) for v in b])[0]

            def jac(x, *b):
                cols = model.jacobian(x[None], t, *[np.array([[v]]) for v in b])
                return np.stack([np.broadcast_to(c, (1, x.size))[0] for c in cols], axis=1)

            for s in range(seeds.shape[0]):
                try:
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore")
                        b, _ = optimize.curve_fit(f, p, q, p0=seeds[s, i], bounds=bounds, jac=jac,
                                                  method="trf")
                    best[i] = min(best[i], float(np.sum((f(p, *b) - q) ** 2)))
                except (RuntimeError, ValueError):
                    pass  # this seed failed; another may not
        out[model_id] = best
    return time.perf_counter() - start, out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=20_000, help="isotherms for the engine (default 20000)")
    ap.add_argument("--baseline-n", type=int, default=1_000,
                    help="random subset fitted by the curve_fit loop (default 1000)")
    ap.add_argument("--repeats", type=int, default=3, help="engine repeats; the median is reported")
    ap.add_argument("--seed", type=int, default=20260512)
    args = ap.parse_args(argv)

    groups = make_isotherms(args.n, args.seed)
    rng = np.random.default_rng(args.seed + 1)
    share = min(1.0, args.baseline_n / max(args.n, 1))
    subset = {m: np.sort(rng.choice(len(isos), size=int(round(share * len(isos))), replace=False))
              for m, isos in groups.items()}
    n_base = sum(len(s) for s in subset.values())

    engine_times = []
    for _ in range(max(args.repeats, 1)):
        elapsed, sse, conv = run_engine(groups)
        engine_times.append(elapsed)
    base_time, base_sse = run_baseline(groups, subset)

    engine_rate = args.n / statistics.median(engine_times)
    base_rate = n_base / base_time if n_base else float("nan")
    eng_on_subset = np.concatenate([sse[m][subset[m]] for m in groups])
    ref = np.concatenate([base_sse[m] for m in groups])
    parity = eng_on_subset <= ref * (1 + PARITY_RTOL)
    better = eng_on_subset < ref * (1 - PARITY_RTOL)
    converged = np.concatenate([conv[m] for m in groups])

    print(f"isotherms: {args.n} ({N_POINTS} points, models: {', '.join(GENERATORS)}), seed {args.seed}")
    print(f"engine   : median {statistics.median(engine_times):.3f} s over {len(engine_times)} run(s) "
          f"[{', '.join(f'{t:.3f}' for t in engine_times)}] -> {engine_rate:,.0f} fits/s, "
          f"converged {converged.mean():.2%}")
    note = "" if n_base == args.n else f" (random subset of {n_base} isotherms, measured once)"
    print(f"baseline : scipy.optimize.curve_fit loop {base_time:.3f} s for {n_base} fits{note} "
          f"-> {base_rate:,.1f} fits/s")
    print(f"ratio    : {engine_rate / base_rate:,.1f}x (engine fits/s / baseline fits/s)")
    print(f"SSE parity (engine <= baseline x (1 + {PARITY_RTOL:g})): {parity.mean():.2%} of {n_base}; "
          f"engine strictly better on {better.mean():.2%}")
    for m in groups:
        if len(subset[m]):
            ok = sse[m][subset[m]] <= base_sse[m] * (1 + PARITY_RTOL)
            print(f"  {m:20s} parity {ok.mean():.2%} of {ok.size}")
    worst = np.argsort(-(eng_on_subset / ref))[:3]
    for i in worst:
        if not parity[i]:
            print(f"  worse case: engine SSE {eng_on_subset[i]:.6g} vs baseline {ref[i]:.6g}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
