"""Helpers shared by the metric modules: selected-model evaluation and flags.

Every metric is computed from the model each isotherm's data selected
(``Selection.best``). Work is grouped by model id so each model is evaluated
once over all the isotherms that selected it.
"""
from __future__ import annotations

import logging
from contextlib import contextmanager
from contextvars import ContextVar
from typing import Hashable, Iterable, Iterator, Sequence, TypeVar

import numpy as np
from numpy.typing import ArrayLike
from scipy import constants

from ..arrays import BoolArray, FloatArray, IntArray, ObjectArray

from ..interrupts import ends_job
from ..models import CATALOGUE, IsothermModel
from ..packing import Packed
from ..results import ModelFits, Selection

log = logging.getLogger(__name__)

Key = TypeVar("Key", bound=Hashable)

# Flag on every row a model's internal error touched: its figure there is nan
# because the model raised, not because the data cannot support it.
INTERNAL_ERROR = "internal_error"

# model id -> packed rows it raised on (empty: rows unknown, so the rows that
# selected it), for the metrics call in progress; None outside one
_internal_errors: ContextVar[dict[str, set[int]] | None] = ContextVar(
    "sorbrank_metric_internal_errors", default=None)

# Gas volumes are quoted at 273.15 K and 101.325 kPa (volumetric adsorption
# convention; common practice, no single source).
STP_TEMPERATURE_K = constants.zero_Celsius
STP_PRESSURE_PA = constants.atm
MOLAR_VOLUME_STP_CM3_PER_MOL = constants.R * STP_TEMPERATURE_K / STP_PRESSURE_PA * 1e6

# Two temperatures closer than this are the same measurement condition.
SAME_TEMPERATURE_TOLERANCE_K = 0.5


def t_quantile_975(dof: ArrayLike) -> FloatArray:
    """Two-sided 95 % Student-t quantile for ``dof`` degrees of freedom; nan where dof < 1."""
    from scipy.special import stdtrit  # what stats.t.ppf calls, without importing scipy.stats
    dof = np.asarray(dof, dtype=float)
    with np.errstate(invalid="ignore"):
        return np.where(dof >= 1, stdtrit(np.maximum(dof, 1.0), 0.975), np.nan)


def positive_interval_95(value: ArrayLike, stderr: ArrayLike, dof: ArrayLike
                         ) -> tuple[FloatArray, FloatArray]:
    """95 % interval (low, high) of a quantity that is positive by nature.

    The Wald interval is built for ln(value), whose standard error is
    stderr / value by the delta method, with the Student-t quantile for
    ``dof``, and mapped back: value * exp(-/+ t * stderr / value). It never
    goes below zero, is asymmetric as the likelihood of a positive parameter
    usually is, and agrees with the plain Wald interval when stderr << value.
    nan where value <= 0 or is not finite, or stderr or dof are missing.
    """
    value, stderr = np.asarray(value, dtype=float), np.asarray(stderr, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ok = np.isfinite(value) & (value > 0) & np.isfinite(stderr) & (stderr >= 0)
        spread = np.exp(t_quantile_975(dof) * np.where(ok, stderr / value, np.nan))
        low = np.where(ok, value / spread, np.nan)
        high = np.where(ok, value * spread, np.nan)
    return low, high


def rows_by(keys: Sequence[Key], rows: Iterable[int]) -> dict[Key, list[int]]:
    """The given row indices grouped by ``keys[row]``, each group in batch order.

    One pass over the rows: a scan of the whole batch per sorbent would make
    the per-sorbent metrics quadratic in the batch size.
    """
    groups: dict[Key, list[int]] = {}
    for i in rows:
        groups.setdefault(keys[i], []).append(int(i))
    return groups


@contextmanager
def internal_errors_recorded() -> Iterator[dict[str, set[int]]]:
    """Collect the models that raise inside metrics within the block (model id ->
    rows), so each is logged once and its rows flagged ``internal_error``."""
    record: dict[str, set[int]] = {}
    token = _internal_errors.set(record)
    try:
        yield record
    finally:
        _internal_errors.reset(token)


def note_internal_error(model: type[IsothermModel], exc: BaseException, where: str,
                        rows: ArrayLike | None = None) -> None:
    """A model raised ``exc`` inside metric ``where``; its figure there becomes nan.

    A broad handler calls this after re-raising job-ending errors
    (``interrupts.ends_job``). Logged with its traceback once per model per
    recorded metrics call (a bug repeats on every group it meets, and one
    traceback is what a maintainer needs); outside a recording, every time.
    """
    record = _internal_errors.get()
    if record is None or model.id not in record:
        log.error("model %s raised in %s: figures nan, rows flagged %s", model.id, where,
                  INTERNAL_ERROR, exc_info=exc)
    if record is not None:
        hit = record.setdefault(model.id, set())
        if rows is not None:
            hit.update(int(i) for i in np.asarray(rows).ravel())


def internal_error_rows(record: dict[str, set[int]], selection: Selection) -> BoolArray:
    """(n,) bool: rows a recorded internal error touched (named rows, else the
    rows that selected the model)."""
    best = np.asarray(selection.best, dtype=object)
    hit = np.zeros(best.shape[0], dtype=bool)
    for model_id, rows in record.items():
        if rows:
            hit[np.fromiter(rows, dtype=int)] = True
        else:
            hit |= best == model_id
    return hit


def new_flags(n: int) -> list[list[str]]:
    return [[] for _ in range(n)]


def add_flag(flags: list[list[str]], where: ArrayLike, name: str) -> None:
    """Append ``name`` to the flag list of every isotherm where ``where`` holds."""
    for i in np.flatnonzero(where):
        if name not in flags[i]:
            flags[i].append(name)


def flags_as_object_array(flags: list[list[str]]) -> ObjectArray:
    out = np.empty(len(flags), dtype=object)
    for i, f in enumerate(flags):
        out[i] = list(f)
    return out


def selected_groups(selection: Selection, fits: dict[str, ModelFits]
                    ) -> Iterator[tuple[type[IsothermModel], ModelFits, IntArray]]:
    """Yield (model class, its fits, row indices) per selected model id.

    Rows whose selected model is unknown to the catalogue or missing from
    ``fits`` are left out; ``has_selected_fit`` reports them.
    """
    best = np.asarray(selection.best, dtype=object)
    for model_id in sorted({b for b in best if b is not None}):
        if model_id not in CATALOGUE or model_id not in fits:
            continue
        rows = np.flatnonzero(best == model_id)
        yield CATALOGUE[model_id], fits[model_id], rows


def has_selected_fit(selection: Selection, fits: dict[str, ModelFits]) -> BoolArray:
    """(n,) bool: the isotherm has a selected model whose parameters are finite."""
    best = np.asarray(selection.best, dtype=object)
    ok = np.zeros(best.shape[0], dtype=bool)
    for _, model_fits, rows in selected_groups(selection, fits):
        ok[rows] = np.all(np.isfinite(model_fits.params[rows]), axis=1)
    return ok


def model_x(model: type[IsothermModel], pressure_pa: FloatArray, saturation_pressure_pa: FloatArray
            ) -> FloatArray:
    """The model's abscissa: p in Pa, or p/p0 for relative-pressure models.

    ``pressure_pa`` is (g, k); ``saturation_pressure_pa`` is (g,).
    """
    if model.relative_pressure:
        return pressure_pa / saturation_pressure_pa[:, None]
    return pressure_pa


def evaluate_model(model: type[IsothermModel], params: np.ndarray, temperature_k: np.ndarray,
                   saturation_pressure_pa: np.ndarray, pressure_pa: np.ndarray) -> np.ndarray:
    """Loading (g, k) in mol/kg of ``model`` with params (g, n_params) at pressures (g, k).

    Never raises: a model that cannot be evaluated gives nan.
    """
    x = model_x(model, pressure_pa, saturation_pressure_pa)
    columns = [params[:, j:j + 1] for j in range(params.shape[1])]
    with np.errstate(all="ignore"):
        try:
            q = model.evaluate(x, temperature_k[:, None], *columns)
        except Exception as exc:  # a model bug must not take the batch down
            if ends_job(exc):
                raise
            note_internal_error(model, exc, "evaluate")
            return np.full(pressure_pa.shape, np.nan)
    q = np.broadcast_to(np.asarray(q, dtype=float), pressure_pa.shape).copy()
    if model.relative_pressure:
        q[~(x < 1.0)] = np.nan
    return q


def selected_loading_and_negative(packed: Packed, fits: dict[str, ModelFits],
                                  selection: Selection, pressure_pa: np.ndarray,
                                  temperature_k: np.ndarray | None = None
                                  ) -> tuple[np.ndarray, np.ndarray]:
    """(loading, negative), each (n, k): the selected model's loading in mol/kg at
    ``pressure_pa`` (n, k), nan where it would be below zero, and where it was.

    A loading below zero is no amount adsorbed (Temkin's logarithm, or any
    model extrapolated far below its data): it is reported as nan with the
    ``negative_predicted_loading`` flag, never as a number. nan where an
    isotherm has no selected model.
    """
    pressure_pa = np.asarray(pressure_pa, dtype=float)
    temperature_k = packed.temperature_k if temperature_k is None else temperature_k
    out = np.full(pressure_pa.shape, np.nan)
    for model, model_fits, rows in selected_groups(selection, fits):
        out[rows] = evaluate_model(model, model_fits.params[rows], temperature_k[rows],
                                   packed.saturation_pressure_pa[rows], pressure_pa[rows])
    negative = out < 0
    return np.where(negative, np.nan, out), negative


def selected_loading(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                     pressure_pa: np.ndarray,
                     temperature_k: np.ndarray | None = None) -> np.ndarray:
    """Loading (n, k) in mol/kg from each isotherm's selected model at ``pressure_pa`` (n, k);
    nan where there is no selected model or the model predicts below zero."""
    return selected_loading_and_negative(packed, fits, selection, pressure_pa, temperature_k)[0]


def measured_pressure_range(packed: Packed) -> tuple[np.ndarray, np.ndarray]:
    """(min, max) measured pressure in Pa of each isotherm, each (n,)."""
    p = packed.pressure_pa
    low = np.min(np.where(packed.mask, p, np.inf), axis=1)
    high = np.max(np.where(packed.mask, p, -np.inf), axis=1)
    return low, high


def max_measured_loading(packed: Packed) -> np.ndarray:
    """Highest measured loading in mol/kg of each isotherm, (n,)."""
    return np.max(np.where(packed.mask, packed.loading_mol_per_kg, -np.inf), axis=1)


def pressure_label(pressure_pa: float) -> str:
    """A column-name-safe label for a pressure: 100000 -> '100000', 2.5 -> '2p5'."""
    if float(pressure_pa).is_integer():
        return str(int(pressure_pa))
    return f"{pressure_pa:.6g}".replace(".", "p").replace("-", "m").replace("+", "")


# Bisection on ln p: 200 halvings shrink any bracket below double precision.
INVERSION_HALVINGS = 200
# The bracket reaches this many e-folds beyond the measured pressures.
INVERSION_SPAN_E_FOLDS = 40.0


def invert_model(model: type[IsothermModel], params: np.ndarray, temperature_k: np.ndarray,
                 saturation_pressure_pa: np.ndarray, loading_mol_per_kg: np.ndarray,
                 low_pa: np.ndarray, high_pa: np.ndarray) -> np.ndarray:
    """Pressure (g, k) in Pa at which the model reaches ``loading_mol_per_kg`` (g, k).

    Batched bisection on ln p in [low_pa, high_pa] (each (g,)); the model is
    taken as increasing in p. nan where the loading is not reached inside the
    bracket or is not finite.
    """
    shape = loading_mol_per_kg.shape
    ln_lo = np.broadcast_to(np.log(low_pa)[:, None], shape).copy()
    ln_hi = np.broadcast_to(np.log(high_pa)[:, None], shape).copy()

    def excess(ln_p: FloatArray) -> FloatArray:
        return evaluate_model(model, params, temperature_k, saturation_pressure_pa,
                              np.exp(ln_p)) - loading_mol_per_kg

    reachable = (excess(ln_lo) <= 0) & (excess(ln_hi) >= 0)
    for _ in range(INVERSION_HALVINGS):
        mid = 0.5 * (ln_lo + ln_hi)
        above = excess(mid) >= 0
        ln_hi = np.where(above, mid, ln_hi)
        ln_lo = np.where(above, ln_lo, mid)
        if np.all(ln_hi - ln_lo <= 1e-15 * np.maximum(np.abs(ln_hi), 1.0)):
            break
    return np.where(reachable, np.exp(0.5 * (ln_lo + ln_hi)), np.nan)


def selected_pressure_at_loading(packed: Packed, fits: dict[str, ModelFits],
                                 selection: Selection,
                                 loading_mol_per_kg: np.ndarray) -> np.ndarray:
    """Pressure (n, k) in Pa at which each isotherm's selected model holds the loading (n, k)."""
    low, high = measured_pressure_range(packed)
    with np.errstate(divide="ignore", invalid="ignore"):
        low = np.where(np.isfinite(low) & (low > 0), low, 1.0) * np.exp(-INVERSION_SPAN_E_FOLDS)
        high = np.where(np.isfinite(high) & (high > 0), high, 1.0) * np.exp(INVERSION_SPAN_E_FOLDS)
    out = np.full(loading_mol_per_kg.shape, np.nan)
    for model, model_fits, rows in selected_groups(selection, fits):
        top = high[rows]
        if model.relative_pressure:
            # p/p0 must stay below 1
            top = packed.saturation_pressure_pa[rows] * (1.0 - 1e-9)
        out[rows] = invert_model(model, model_fits.params[rows], packed.temperature_k[rows],
                                 packed.saturation_pressure_pa[rows], loading_mol_per_kg[rows],
                                 low[rows], top)
    return out
