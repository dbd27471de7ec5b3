"""Builders for metric tests: ModelFits and Selection made from known (truth)
parameters, so metrics are tested without the fit engine. No tests here."""
from __future__ import annotations

import numpy as np

from sorbrank.worker.isotherm import Batch, Conditions, Isotherm
from sorbrank.worker.models import CATALOGUE
from sorbrank.worker.packing import pack
from sorbrank.worker.results import ModelFits, Selection


def truth_fits(model_id: str, params, covariance=None) -> ModelFits:
    """A ModelFits holding the given parameters (n, k) as if fitted exactly."""
    params = np.atleast_2d(np.asarray(params, dtype=float))
    n, k = params.shape
    cov = np.zeros((n, k, k)) if covariance is None else np.asarray(covariance, dtype=float)
    stderr = np.sqrt(np.diagonal(cov, axis1=1, axis2=2))
    zeros = np.zeros(n)
    return ModelFits(
        model_id=model_id, param_names=CATALOGUE[model_id].param_names(), params=params,
        stderr=stderr, ci95_low=params - 1.96 * stderr, ci95_high=params + 1.96 * stderr,
        covariance=cov, sse=zeros, rmse=zeros, r2=np.ones(n), aic=zeros, aicc=zeros, bic=zeros,
        n_params=k, converged=np.ones(n, bool), reason=np.array([""] * n, dtype=object),
        at_bound=np.zeros((n, k), bool), applicable=np.ones(n, bool),
        n_points=np.full(n, 10, dtype=np.int64))


def stack_fits(per_isotherm: list[tuple[str, list[float]]]) -> tuple[dict, Selection]:
    """Fits dict and Selection for isotherms whose selected model and parameters are
    given one by one (model_id None = nothing selected)."""
    n = len(per_isotherm)
    model_ids = sorted({m for m, _ in per_isotherm if m is not None})
    fits = {}
    for model_id in model_ids:
        k = len(CATALOGUE[model_id].params)
        params = np.full((n, k), np.nan)
        for i, (m, p) in enumerate(per_isotherm):
            if m == model_id:
                params[i] = p
        fits[model_id] = truth_fits(model_id, params)
    best = np.array([m for m, _ in per_isotherm], dtype=object)
    return fits, selection_of(best, model_ids)


def selection_of(best, model_ids=None) -> Selection:
    best = np.asarray(best, dtype=object)
    n = best.shape[0]
    model_ids = model_ids or sorted({b for b in best if b is not None})
    return Selection(criterion="aicc", model_ids=list(model_ids), best=best,
                     weights=np.ones((n, len(model_ids))), ambiguous=np.zeros(n, bool),
                     runner_up=np.full(n, None, dtype=object),
                     delta_runner_up=np.full(n, np.nan), excluded={})


def langmuir_isotherm(iso_id, sorbent, gas, temperature_k, q_sat, affinity, pressure_pa,
                      **kw) -> Isotherm:
    p = np.asarray(pressure_pa, dtype=float)
    return Isotherm(iso_id, sorbent, gas, temperature_k, p,
                    q_sat * affinity * p / (1 + affinity * p), **kw)


def batch_of(isotherms, conditions=None, mixtures=None):
    batch = Batch("test", list(isotherms), conditions=conditions or Conditions(),
                  mixtures=list(mixtures or []))
    return batch, pack(batch.isotherms)
