"""Which model the data support: information criteria, Akaike weights, ambiguity.

Rules (per isotherm):

* eligible models are those that converged, apply, have a finite criterion
  and no parameter on a bound, and whose form is identifiable where the data
  lie relative to p0 (``data_range_exclusions``: a multilayer model only when
  the data reach p/p0 >= ``MULTILAYER_MIN_RELATIVE_PRESSURE``); every other
  model gets its exclusion reason;
* the eligible model with the smallest criterion is the candidate; Akaike
  weights w_i = exp(-delta_i / 2) / sum_j exp(-delta_j / 2) over eligible
  models (Burnham & Anderson 2002); with ``criterion="bic"`` the same formula
  gives BIC weights;
* if another eligible model lies within ``AMBIGUITY_DELTA`` (2 units) the
  choice is ``ambiguous`` and the model with the fewest parameters among
  those within 2 units wins (ties: the smaller criterion);
* ``runner_up`` is the best-scoring eligible model other than the chosen one
  and ``delta_runner_up`` its criterion minus the chosen model's: negative
  when parsimony chose a model that scored slightly worse.
"""
from __future__ import annotations

import numpy as np

from .models import CATALOGUE, IsothermModel
from .models.linear import masked_linear_fit
from .packing import Packed
from .results import ModelFits, Selection

CRITERIA = ("aicc", "aic", "bic")
AMBIGUITY_DELTA = 2.0
# Far below p0 the BET form q = n_m c x / ((1 - x)(1 - x + c x)) is the Langmuir
# form n_m' K x / (1 + K x) (K = c - 1, n_m' = n_m c / K) times 1/(1 - x): the
# multilayer term changes the loading by about x, so with data below p/p0 =
# 0.05 it is a 5 %-at-most wiggle that a 1 % noise absorbs and BET (or GAB)
# wins on noise alone with the same two parameters as Langmuir. 0.05 is the
# lower end of the classical BET range 0.05-0.30 (Brunauer, Emmett & Teller
# 1938; ISO 9277, from memory), where the multilayer term is measured.
MULTILAYER_MIN_RELATIVE_PRESSURE = 0.05


def exclusion_reasons(fits: ModelFits, criterion: str = "aicc") -> np.ndarray:
    """Why each isotherm's fit of this model cannot compete; "" where it can. (n,) object."""
    value = getattr(fits, criterion)
    on_bound = np.full(fits.n, "", dtype=object)
    for j, name in enumerate(fits.param_names):  # loop over parameters, not isotherms
        sep = np.where(on_bound == "", "", ", ").astype(object)
        on_bound = np.where(fits.at_bound[:, j], on_bound + sep + name, on_bound)
    reason = np.where(on_bound != "", "parameter at bound: " + on_bound, "").astype(object)
    reason[~np.isfinite(value)] = f"non-finite {criterion}"
    failed = ~fits.converged
    reason[failed] = "not converged: " + fits.reason[failed].astype(object)
    reason[~fits.applicable] = fits.reason[~fits.applicable]
    return reason


def data_range_exclusions(model: type[IsothermModel], packed: Packed) -> np.ndarray:
    """Why ``model`` cannot compete on each isotherm given where its data lie
    relative to p0; "" where it can. (n,) object.

    Multilayer models (BET, GAB) need a saturation pressure and data reaching
    p/p0 >= MULTILAYER_MIN_RELATIVE_PRESSURE. Pore-filling models (Dubinin
    family) need a saturation pressure with every point below it, which the
    engine already requires of every p/p0 model; their home is low p/p0 (the
    micropore-filling range), so no lower bound applies to them.
    """
    reason = np.full(packed.n, "", dtype=object)
    if not model.multilayer:
        return reason
    with np.errstate(divide="ignore", invalid="ignore"):
        top = np.max(np.where(packed.mask, packed.relative_pressure, -np.inf), axis=1,
                     initial=-np.inf)  # an empty batch has zero-width rows
    has_p0 = np.isfinite(packed.saturation_pressure_pa) & (packed.saturation_pressure_pa > 0)
    short = has_p0 & ~(top >= MULTILAYER_MIN_RELATIVE_PRESSURE)
    reason[short] = (f"data below p/p0 = {MULTILAYER_MIN_RELATIVE_PRESSURE:g}: "
                     "multilayer term not identifiable (reduces to Langmuir)")
    return reason


def select(fits: dict[str, ModelFits], criterion: str = "aicc",
           packed: Packed | None = None) -> Selection:
    """Choose a model per isotherm by ``criterion`` ("aicc", "aic" or "bic").

    With ``packed`` (the data the fits came from) the data-range rule of
    ``data_range_exclusions`` applies too; without it only the fits decide.
    """

    if criterion not in CRITERIA:
        raise ValueError(f"criterion must be one of {', '.join(CRITERIA)}; got {criterion!r}")
    if not fits:
        raise ValueError("select() needs at least one model's fits")
    model_ids = list(fits)
    n = fits[model_ids[0]].n
    rows = np.arange(n)
    excluded = {mid: exclusion_reasons(fits[mid], criterion) for mid in model_ids}
    if packed is not None:
        for mid in model_ids:
            if mid in CATALOGUE:
                by_range = data_range_exclusions(CATALOGUE[mid], packed)
                excluded[mid] = np.where(excluded[mid] == "", by_range, excluded[mid])
    eligible = np.stack([excluded[mid] == "" for mid in model_ids], axis=1)
    value = np.stack([getattr(fits[mid], criterion) for mid in model_ids], axis=1)
    value = np.where(eligible, value, np.inf)
    k = np.array([fits[mid].n_params for mid in model_ids])

    any_ok = eligible.any(axis=1)
    lowest = np.where(any_ok, value.min(axis=1), np.nan)
    with np.errstate(invalid="ignore", over="ignore"):
        delta = value - lowest[:, None]
        raw = np.where(eligible, np.exp(-0.5 * delta), 0.0)
    total = raw.sum(axis=1, keepdims=True)
    weights = np.where(total > 0, raw / np.where(total > 0, total, 1.0), 0.0)

    # parsimony among models within AMBIGUITY_DELTA of the minimum:
    # fewest parameters first, then the smaller criterion
    close = eligible & (delta <= AMBIGUITY_DELTA)
    ambiguous = close.sum(axis=1) > 1
    order_k = np.where(close, k[None, :], np.iinfo(np.int64).max)
    fewest = order_k == order_k.min(axis=1, keepdims=True)
    best_col = np.argmin(np.where(close & fewest, value, np.inf), axis=1)

    others = value.copy()
    others[rows, best_col] = np.inf
    has_runner = np.isfinite(others).any(axis=1)
    runner_col = np.argmin(others, axis=1)

    ids = np.array(model_ids, dtype=object)
    with np.errstate(invalid="ignore"):
        delta_runner_up = np.where(has_runner & any_ok,
                                   value[rows, runner_col] - value[rows, best_col], np.nan)
    return Selection(
        criterion=criterion,
        model_ids=model_ids,
        # numpy's stubs take no bare None as a value; numpy itself does (an object array)
        best=np.where(any_ok, ids[best_col], None).astype(object),  # type: ignore[attr-defined]
        weights=weights,
        ambiguous=ambiguous,
        runner_up=np.where(has_runner & any_ok, ids[runner_col], None).astype(object),  # type: ignore[attr-defined]
        delta_runner_up=delta_runner_up,
        excluded=excluded,
    )


def linearized_langmuir(packed: Packed) -> tuple[np.ndarray, np.ndarray]:
    """Double-reciprocal Langmuir estimate per isotherm: (q_sat mol/kg, affinity 1/Pa).

    The classical straight line 1/q = 1/(q_sat b) * (1/p) + 1/q_sat through the
    points with p > 0 and q > 0: q_sat = 1/intercept, b = intercept/slope.
    Reported beside the nonlinear fit because it is what many screening
    sheets still quote; its least-squares weighting in 1/q over-weights the
    low-pressure points, so it is never used for selection. nan where the
    line has a non-positive slope or intercept.
    """
    p, q = packed.pressure_pa, packed.loading_mol_per_kg
    ok = packed.mask & (p > 0) & (q > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        slope, intercept, _ = masked_linear_fit(1.0 / np.where(ok, p, 1.0),
                                                1.0 / np.where(ok, q, 1.0), ok)
        good = (slope > 0) & (intercept > 0)
        q_sat = np.where(good, 1.0 / intercept, np.nan)
        affinity = np.where(good, intercept / slope, np.nan)
    return q_sat, affinity
