"""Intake result -> pack -> fit every model -> select -> metrics -> BatchResult.

The one way isotherms get fitted: ``sorbrank fit``, the embedded server and
the Celery worker all call ``process_batch``. Fitting and selection are
row-independent, so a large batch is split into chunks that may run on
several processes; metrics then run once over the whole batch because
per-sorbent figures (isosteric heat, IAST) need all of a sorbent's
isotherms together.
"""
from __future__ import annotations

import os
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import pyarrow as pa
from numpy.typing import ArrayLike

from .arrays import FloatArray

from .engine import SolverOptions, check_weighting, fit_models, resolve_models
from .isotherm import DEFAULT_CHUNK_SIZE, Batch
from .packing import Packed, pack
from .results import ModelFits, Selection
from .selection import CRITERIA, linearized_langmuir, select
from .store.schema import QUALITY_FLAGS, REFERENCE_LISTS, conform

Progress = Callable[[int, int], None]  # (isotherms done, isotherms total)

# per-fit goodness of fit against absolute sigma (ModelFits fields and columns)
CHI_SQUARE_FIELDS = ("chi_square", "chi_square_dof", "chi_square_p_value")


@dataclass
class FitOptions:
    """What to fit and how to choose. Refuses unknown values when built."""

    models: str | list[str] = "all"     # "all", "a,b", or a list of model ids
    criterion: str = "aicc"             # "aicc" | "aic" | "bic"
    weighting: str = "uniform"          # "uniform" | "relative" | "sigma"
    # with weighting "sigma": the sigma is calibrated, so the covariance is not
    # rescaled by the residual variance and a chi-square test is reported
    absolute_sigma: bool = False
    # the fit engine's tolerances and switches; every caller keeps the defaults
    solver: SolverOptions = field(default_factory=SolverOptions)

    def __post_init__(self) -> None:
        if self.criterion not in CRITERIA:
            raise ValueError(f"criterion must be one of {', '.join(CRITERIA)}; got {self.criterion!r}")
        if not isinstance(self.absolute_sigma, bool):
            raise ValueError(f"absolute_sigma must be true or false; got {self.absolute_sigma!r}")
        if not isinstance(self.solver, SolverOptions):
            raise ValueError(f"solver must be SolverOptions; got {type(self.solver).__name__}")
        check_weighting(self.weighting, self.absolute_sigma)
        try:
            chosen = resolve_models(self.models)
        except KeyError as exc:
            raise ValueError(exc.args[0]) from None
        if not chosen:
            raise ValueError("at least one model is needed")

    @property
    def model_ids(self) -> list[str]:
        return [m.id for m in resolve_models(self.models)]


@dataclass
class BatchResult:
    """Everything one batch produced, columnar; JSON and Arrow views on demand."""

    batch: Batch
    options: FitOptions
    packed: Packed
    fits: dict[str, ModelFits]
    selection: Selection
    linearized: dict[str, FloatArray]        # q_sat_mol_per_kg, affinity_per_pa (double reciprocal)
    summary: dict[str, np.ndarray] = field(default_factory=dict)   # metric columns, length n
    sorbent_rows: list[dict[str, Any]] = field(default_factory=list)

    @property
    def n(self) -> int:
        return self.packed.n

    def flags(self) -> list[list[str]]:
        """Per isotherm: intake flags, then "ambiguous_model", then metric flags."""
        out = [list(iso.flags) for iso in self.batch.isotherms]
        for i in np.flatnonzero(self.selection.ambiguous):
            out[i].append("ambiguous_model")
        metric_flags = self.summary.get("flags")
        if metric_flags is not None:
            for row, extra in enumerate(metric_flags):
                out[row].extend(f for f in (extra or []) if f not in out[row])
        return out

    # -- JSON view ----------------------------------------------------------
    def isotherm_records(self) -> list[dict[str, Any]]:
        """One JSON-ready dict per isotherm (the ``sorbrank fit`` contract).

        Numbers are in canonical units; NaN and +-inf become None.
        """
        p, sel = self.packed, self.selection
        col = {mid: j for j, mid in enumerate(sel.model_ids)}
        per_model = {mid: _fit_lists(f, sel.weights[:, col[mid]]) for mid, f in self.fits.items()}
        lin_q = _json_list(self.linearized["q_sat_mol_per_kg"])
        lin_b = _json_list(self.linearized["affinity_per_pa"])
        temps = _json_list(p.temperature_k)
        references, per_pressure = self._reference_columns()
        metric = {name: _json_list(v) for name, v in self.summary.items()
                  if name != "flags" and name not in per_pressure}
        metric.update({name: _json_list(v) for name, v in references.items()})
        flags = self.flags()
        bet_ranges = self._bet_ranges()
        records = []
        for i in range(p.n):
            records.append({
                "isotherm_id": p.isotherm_ids[i],
                "sorbent_id": p.sorbent_ids[i],
                "adsorbate": p.adsorbates[i],
                "temperature_k": temps[i],
                "n_points": int(p.n_points[i]),
                "best_model": sel.best[i],
                "ambiguous": bool(sel.ambiguous[i]),
                QUALITY_FLAGS: flags[i],
                "fits": [_fit_record(mid, lists, i) for mid, lists in per_model.items()],
                "linearized_langmuir": {"q_sat": lin_q[i], "affinity": lin_b[i]},
                "summary": {**{name: values[i] for name, values in metric.items()},
                            "bet_range_relative_pressure": bet_ranges[i],
                            QUALITY_FLAGS: flags[i]},
            })
        return records

    def to_json(self) -> dict[str, Any]:
        """The whole batch as a JSON-ready dict (valid JSON: no NaN)."""
        return {
            "batch": self.batch.label,
            "options": {"models": self.options.model_ids, "criterion": self.options.criterion,
                        "weighting": self.options.weighting,
                        "absolute_sigma": self.options.absolute_sigma},
            "isotherms": self.isotherm_records(),
            "rejected": [issue.as_dict() for issue in self.batch.rejected],
            "sorbents": _json_clean(self.sorbent_rows),
        }

    # -- Arrow views --------------------------------------------------------
    def fits_table(self) -> pa.Table:
        """One row per isotherm x model, flat columns a database takes as is.

        Columns: isotherm_id, sorbent_id, adsorbate, branch, temperature_k,
        n_points, model, n_params, applicable, converged, reason, selected,
        excluded_reason, sse, rmse, r2, aic, aicc, bic, chi_square,
        chi_square_dof, chi_square_p_value (nan unless absolute sigma),
        akaike_weight, then
        for every parameter name of the whole model catalogue (units: the
        catalogue) param_<name>, stderr_<name>, ci95_low_<name>,
        ci95_high_<name>, at_bound_<name> -- null where the row's model has no
        such parameter: the same columns whichever models a batch fits
        (worker/store/schema.py). NaN is stored as null; +-inf stays (e.g.
        AICc with too few points).
        """
        p, sel = self.packed, self.selection
        ids = list(self.fits)
        n, n_models = p.n, len(ids)
        rep = lambda values: np.repeat(np.asarray(values, dtype=object), n_models)  # noqa: E731

        def stacked(get: Callable[[str, ModelFits], ArrayLike]) -> np.ndarray:
            return np.stack([np.asarray(get(mid, self.fits[mid])) for mid in ids], axis=1).ravel() \
                if n_models else np.zeros(0)

        weight_col = {mid: j for j, mid in enumerate(sel.model_ids)}
        columns = {
            "isotherm_id": pa.array(rep(p.isotherm_ids), pa.string()),
            "sorbent_id": pa.array(rep(p.sorbent_ids), pa.string()),
            "adsorbate": pa.array(rep(p.adsorbates), pa.string()),
            "branch": pa.array(rep(p.branches), pa.string()),
            "temperature_k": _float_array(np.repeat(p.temperature_k, n_models)),
            "n_points": pa.array(np.repeat(p.n_points, n_models), pa.int64()),
            "model": pa.array(np.tile(np.array(ids, dtype=object), n), pa.string()),
            "n_params": pa.array(np.tile([self.fits[m].n_params for m in ids], n).astype(np.int64)),
            "applicable": pa.array(stacked(lambda m, f: f.applicable).astype(bool)),
            "converged": pa.array(stacked(lambda m, f: f.converged).astype(bool)),
            "reason": pa.array(stacked(lambda m, f: f.reason).astype(object), pa.string()),
            "selected": pa.array(stacked(lambda m, f: sel.best == m).astype(bool)),
            "excluded_reason": pa.array(stacked(lambda m, f: sel.excluded[m]).astype(object), pa.string()),
        }
        for stat in ("sse", "rmse", "r2", "aic", "aicc", "bic") + CHI_SQUARE_FIELDS:
            columns[stat] = _float_array(stacked(lambda m, f: getattr(f, stat)).astype(float))
        columns["akaike_weight"] = _float_array(
            stacked(lambda m, f: sel.weights[:, weight_col[m]]).astype(float))

        names: list[str] = []
        for f in self.fits.values():
            names.extend(nm for nm in f.param_names if nm not in names)
        for name in names:
            for prefix, attr in (("param", "params"), ("stderr", "stderr"),
                                 ("ci95_low", "ci95_low"), ("ci95_high", "ci95_high")):
                columns[f"{prefix}_{name}"] = _float_array(
                    stacked(lambda m, f: _param_column(f, getattr(f, attr), name)).astype(float))
            has = stacked(lambda m, f: np.full(f.n, name in f.param_names))
            bound = stacked(lambda m, f: _param_column(f, f.at_bound.astype(float), name)).astype(float)
            columns[f"at_bound_{name}"] = pa.array(bound == 1.0, pa.bool_(), mask=~has.astype(bool))
        # every catalogue parameter has its columns (typed nulls where unused)
        return conform("fits", pa.table(columns)).drop_columns(["accepted_at"])

    def summary_table(self) -> pa.Table:
        """One row per isotherm: identity, selection, double-reciprocal
        estimate, the metric columns (the figures at the batch's reference
        pressures as lists beside reference_pressures_pa), and quality_flags
        (list of strings); the declared columns of worker/store/schema.py."""
        p, sel = self.packed, self.selection
        columns = {
            "isotherm_id": pa.array(p.isotherm_ids, pa.string()),
            "sorbent_id": pa.array(p.sorbent_ids, pa.string()),
            "adsorbate": pa.array(p.adsorbates, pa.string()),
            "branch": pa.array(p.branches, pa.string()),
            "temperature_k": _float_array(p.temperature_k),
            "n_points": pa.array(p.n_points.astype(np.int64), pa.int64()),
            "criterion": pa.array([sel.criterion] * p.n, pa.string()),
            "best_model": pa.array(list(sel.best), pa.string()),
            "ambiguous": pa.array(sel.ambiguous.astype(bool)),
            "runner_up": pa.array(list(sel.runner_up), pa.string()),
            "delta_runner_up": _float_array(sel.delta_runner_up),
            "linearized_q_sat_mol_per_kg": _float_array(self.linearized["q_sat_mol_per_kg"]),
            "linearized_affinity_per_pa": _float_array(self.linearized["affinity_per_pa"]),
        }
        references, per_pressure = self._reference_columns()
        for name, values in self.summary.items():
            if name == "flags" or name in columns or name in per_pressure:
                continue
            values = np.asarray(values)
            if values.dtype.kind == "f":
                columns[name] = _float_array(values)
            else:
                columns[name] = pa.array(values.tolist())
        columns["bet_range_relative_pressure"] = pa.array(
            self._bet_ranges(), pa.list_(pa.float64()))
        for name, values in references.items():
            columns[name] = _float_lists(values)
        columns[QUALITY_FLAGS] = pa.array(self.flags(), pa.list_(pa.string()))
        # the declared columns, in their order and types (accepted_at: the store's)
        return conform("summaries", pa.table(columns)).drop_columns(["accepted_at"])

    def _reference_columns(self) -> tuple[dict[str, FloatArray], set[str]]:
        """The figures at the batch's reference pressures as (n, k) arrays, one
        per list column of the summaries, and the per-pressure names of the
        metric columns they gather (their values go to the lists)."""
        pressures = [float(p) for p in self.batch.conditions.reference_pressures_pa]
        if not self.summary:
            return {}, set()
        from .metrics.common import pressure_label

        labels = [pressure_label(p) for p in pressures]
        out = {"reference_pressures_pa": np.tile(np.asarray(pressures, dtype=float), (self.n, 1))}
        consumed: set[str] = set()
        for list_name, template in REFERENCE_LISTS:
            names = [template.format(p=label) for label in labels]
            if all(name in self.summary for name in names):
                out[list_name] = np.stack([np.asarray(self.summary[name], dtype=float)
                                           for name in names], axis=1) if names else \
                    np.zeros((self.n, 0))
                consumed.update(names)
        return out, consumed

    def _bet_ranges(self) -> list[list[float] | None]:
        """[low, high] p/p0 of the chosen BET range per isotherm, None where none."""
        low = _json_list(self.summary.get("bet_range_relative_pressure_low", np.full(self.n, np.nan)))
        high = _json_list(self.summary.get("bet_range_relative_pressure_high", np.full(self.n, np.nan)))
        return [None if lo is None or hi is None else [lo, hi] for lo, hi in zip(low, high)]


# ---------------------------------------------------------------------------
# running

def process_batch(batch: Batch, options: FitOptions | None = None, *, workers: int = 1,
                  chunk_size: int = DEFAULT_CHUNK_SIZE, progress: Progress | None = None) -> BatchResult:
    """Fit, select and summarise every accepted isotherm of ``batch``.

    ``workers`` > 1 fits chunks of ``chunk_size`` isotherms in that many
    processes; the result is identical to the serial run.
    """
    options = options or FitOptions()
    packed = pack(batch.isotherms)
    fits, selection = _fit_and_select_chunks(packed, options, workers, chunk_size, progress)
    q_lin, b_lin = linearized_langmuir(packed)
    result = BatchResult(batch=batch, options=options, packed=packed, fits=fits, selection=selection,
                         linearized={"q_sat_mol_per_kg": q_lin, "affinity_per_pa": b_lin})
    if packed.n:
        from . import metrics  # imported here: metrics depend on the catalogue, not the reverse

        result.summary = metrics.summarize(packed, fits, selection, batch, options.weighting)
        result.sorbent_rows = [_renamed_flags(row) for row in
                               metrics.sorbent_metrics(packed, fits, selection, batch)]
    return result


def process_isotherms_parallel(batch: Batch, options: FitOptions | None = None, workers: int | None = None,
                               chunk_size: int = DEFAULT_CHUNK_SIZE,
                               progress: Progress | None = None) -> BatchResult:
    """``process_batch`` on all cores (or ``workers`` processes)."""
    return process_batch(batch, options, workers=workers or os.cpu_count() or 1,
                         chunk_size=chunk_size, progress=progress)


def fit_and_select(packed: Packed, options: FitOptions) -> tuple[dict[str, ModelFits], Selection]:
    """Fit the chosen models to ``packed`` and select per isotherm."""
    fits = fit_models(packed, options.model_ids, options.weighting, options.absolute_sigma, options.solver)
    return fits, select(fits, options.criterion, packed)


def _renamed_flags(row: dict[str, Any]) -> dict[str, Any]:
    """A metrics row with its flags under the stored name (one vocabulary for
    the tables, the JSON and the Python API)."""
    if "flags" in row:
        row[QUALITY_FLAGS] = row.pop("flags")
    return row


def _fit_and_select_chunks(packed: Packed, options: FitOptions, workers: int, chunk_size: int,
                           progress: Progress | None
                           ) -> tuple[dict[str, ModelFits], Selection]:
    bounds = list(range(0, packed.n, max(int(chunk_size), 1))) or [0]
    chunks = [np.arange(start, min(start + chunk_size, packed.n)) for start in bounds]
    done = 0
    parts = []
    if workers > 1 and len(chunks) > 1:
        with ProcessPoolExecutor(max_workers=min(workers, len(chunks))) as pool:
            for index, part in zip(chunks, pool.map(fit_and_select, [packed.take(c) for c in chunks],
                                                    [options] * len(chunks))):
                parts.append(part)
                done += index.size
                if progress:
                    progress(done, packed.n)
    else:
        for index in chunks:
            parts.append(fit_and_select(packed.take(index) if len(chunks) > 1 else packed, options))
            done += index.size
            if progress:
                progress(done, packed.n)
    if len(parts) == 1:
        return parts[0]
    return _concat_fits([p[0] for p in parts]), _concat_selections([p[1] for p in parts])


def _concat_fits(parts: list[dict[str, ModelFits]]) -> dict[str, ModelFits]:
    out: dict[str, ModelFits] = {}
    for mid, first in parts[0].items():
        pieces = [p[mid] for p in parts]
        arrays = {name: np.concatenate([getattr(f, name) for f in pieces], axis=0)
                  for name in ("params", "stderr", "ci95_low", "ci95_high", "covariance", "sse",
                               "rmse", "r2", "aic", "aicc", "bic", "converged", "reason",
                               "at_bound", "applicable", "n_points") + CHI_SQUARE_FIELDS}
        out[mid] = ModelFits(model_id=mid, param_names=first.param_names,
                             n_params=first.n_params, **arrays)
    return out


def _concat_selections(parts: list[Selection]) -> Selection:
    first = parts[0]
    cat = lambda name: np.concatenate([getattr(s, name) for s in parts], axis=0)  # noqa: E731
    return Selection(
        criterion=first.criterion, model_ids=first.model_ids, best=cat("best"),
        weights=cat("weights"), ambiguous=cat("ambiguous"), runner_up=cat("runner_up"),
        delta_runner_up=cat("delta_runner_up"),
        excluded={mid: np.concatenate([s.excluded[mid] for s in parts]) for mid in first.model_ids},
    )


# ---------------------------------------------------------------------------
# conversions

def _float_array(values: ArrayLike) -> pa.Array:
    values = np.asarray(values, dtype=float)
    return pa.array(values, pa.float64(), mask=np.isnan(values))


def _float_lists(values: FloatArray) -> pa.Array:
    """(n, k) floats -> list<double> of k values per row, NaN as null."""
    values = np.asarray(values, dtype=float)
    n, k = values.shape
    flat = values.ravel()
    offsets = pa.array(np.arange(n + 1, dtype=np.int32) * k, pa.int32())
    return pa.ListArray.from_arrays(offsets, pa.array(flat, pa.float64(), mask=np.isnan(flat)))


def _json_list(values: ArrayLike) -> list[Any]:
    """Array -> list with None for NaN/inf (JSON has neither)."""
    values = np.asarray(values)
    if values.dtype.kind in "fc":
        out = values.astype(object)
        out[~np.isfinite(values)] = None
        return out.tolist()
    if values.dtype.kind == "O":
        return [_json_clean(v) for v in values.tolist()]
    return values.tolist()


def _json_clean(value: Any) -> Any:
    # numpy scalars first: numpy.float64 is also a float, and orjson refuses it
    if isinstance(value, np.generic):
        return _json_clean(value.item())
    if isinstance(value, float):
        return value if np.isfinite(value) else None
    if isinstance(value, np.ndarray):
        return _json_list(value)
    if isinstance(value, dict):
        return {k: _json_clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_clean(v) for v in value]
    return value


def _param_column(fits: ModelFits, values: FloatArray, name: str) -> FloatArray:
    if name not in fits.param_names:
        return np.full(fits.n, np.nan)
    return values[:, fits.param_names.index(name)]


def _fit_lists(f: ModelFits, weight: FloatArray) -> dict[str, Any]:
    """A model's fits as plain lists (one conversion per array, not per value)."""
    return {
        "names": f.param_names,
        "params": _json_list(f.params), "stderr": _json_list(f.stderr),
        "ci_low": _json_list(f.ci95_low), "ci_high": _json_list(f.ci95_high),
        "at_bound": f.at_bound.tolist(), "converged": f.converged.tolist(),
        "reason": f.reason.tolist(), "n_params": f.n_params,
        **{s: _json_list(getattr(f, s)) for s in ("sse", "rmse", "r2", "aic", "aicc", "bic")
           + CHI_SQUARE_FIELDS},
        "weight": _json_list(weight),
    }


def _fit_record(model_id: str, lists: dict[str, Any], i: int) -> dict[str, Any]:
    names = lists["names"]
    return {
        "model": model_id,
        "converged": bool(lists["converged"][i]),
        "reason": lists["reason"][i],
        "params": dict(zip(names, lists["params"][i])),
        "stderr": dict(zip(names, lists["stderr"][i])),
        "ci95": {nm: [lo, hi] for nm, lo, hi in zip(names, lists["ci_low"][i], lists["ci_high"][i])},
        "sse": lists["sse"][i], "rmse": lists["rmse"][i], "r2": lists["r2"][i],
        "aic": lists["aic"][i], "aicc": lists["aicc"][i], "bic": lists["bic"][i],
        **{s: lists[s][i] for s in CHI_SQUARE_FIELDS},
        "akaike_weight": lists["weight"][i],
        "n_params": lists["n_params"],
        "at_bound": {nm: bool(b) for nm, b in zip(names, lists["at_bound"][i])},
    }


__all__ = ["FitOptions", "BatchResult", "process_batch", "process_isotherms_parallel",
           "fit_and_select", "DEFAULT_CHUNK_SIZE"]
