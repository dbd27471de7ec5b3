"""Ideal adsorbed solution theory (Myers & Prausnitz, AIChE J. 11 (1965) 121).

At total pressure P and gas mole fractions y_i, the adsorbed phase x_i and the
pure-component pressures p_i^0 satisfy y_i P = x_i p_i^0 and equal reduced
spreading pressures psi_i(p_i^0) = psi, where psi_i(p) = integral_0^p q_i(t)/t dt
(mol/kg). With p_i^0(psi) the inverse of psi_i, the single unknown psi solves

    h(psi) = 1 - sum_i y_i P / p_i^0(psi) = 0,    dh/dpsi = sum_i x_i / q_i(p_i^0),

which is increasing in psi; both it and the inner inversions (d psi_i / d ln p
= q_i(p)) are solved by Newton steps kept inside a shrinking bracket, batched
over every (request, sorbent) pair at once. Total loading follows from
1/q_T = sum_i x_i / q_i(p_i^0), component loadings from q_i = x_i q_T.

psi_i is in closed form where the model class declares one
(``reduced_spreading_pressure``, e.g. Langmuir's q_sat ln(1 + b p)); every
other model is integrated numerically in ln p by a fixed
composite Gauss-Legendre rule (IAST_PANELS panels of IAST_NODES_PER_PANEL
nodes) over IAST_LOG_SPAN e-folds below p, plus the Henry-law tail q(p_low)
for the rest down to zero (exact for a model linear in p there).
"""
from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from ..adsorbates import lookup
from ..arrays import FloatArray, IntArray
from ..isotherm import MixtureRequest
from ..models import CATALOGUE, IsothermModel
from ..packing import Packed
from ..results import ModelFits, Selection
from .common import SAME_TEMPERATURE_TOLERANCE_K, evaluate_model, measured_pressure_range, rows_by

IAST_LOG_SPAN = np.log(1e12)
IAST_PANELS = 24
IAST_NODES_PER_PANEL = 8
IAST_MAX_ITERATIONS = 100
IAST_RELATIVE_TOLERANCE = 1e-14
# pure-component pressures are searched this many e-folds around the total pressure
IAST_PRESSURE_SPAN_E_FOLDS = 60.0


def _gauss_legendre_unit_nodes() -> tuple[np.ndarray, np.ndarray]:
    """Composite Gauss-Legendre nodes and weights on [0, 1]."""
    t, w = np.polynomial.legendre.leggauss(IAST_NODES_PER_PANEL)
    edges = np.linspace(0.0, 1.0, IAST_PANELS + 1)
    half = 0.5 * np.diff(edges)
    nodes = (edges[:-1, None] + half[:, None] * (t[None, :] + 1.0)).ravel()
    weights = (half[:, None] * w[None, :]).ravel()
    return nodes, weights


_UNIT_NODES, _UNIT_WEIGHTS = _gauss_legendre_unit_nodes()


def spreading_pressure(model: type[IsothermModel], params: FloatArray, temperature_k: FloatArray,
                       saturation_pressure_pa: FloatArray, pressure_pa: FloatArray,
                       analytic: bool = True) -> FloatArray:
    """Reduced spreading pressure psi (g,) in mol/kg at pressure_pa (g,).

    ``analytic=False`` forces the numerical rule (used to test it).
    """
    closed_form = model.reduced_spreading_pressure
    if analytic and model.has_closed_form_spreading_pressure() and closed_form is not None:
        with np.errstate(all="ignore"):
            return closed_form(
                pressure_pa, *[params[:, j] for j in range(params.shape[1])])
    ln_p = np.log(pressure_pa)[:, None]
    nodes = np.exp(ln_p - IAST_LOG_SPAN * (1.0 - _UNIT_NODES[None, :]))
    q_nodes = evaluate_model(model, params, temperature_k, saturation_pressure_pa, nodes)
    tail = evaluate_model(model, params, temperature_k, saturation_pressure_pa,
                          np.exp(ln_p - IAST_LOG_SPAN))[:, 0]
    psi = tail + IAST_LOG_SPAN * q_nodes @ _UNIT_WEIGHTS
    # a negative loading anywhere (e.g. Temkin at low p) has no spreading pressure
    bad = np.any(q_nodes < 0, axis=1) | (tail < 0)
    return np.where(bad, np.nan, psi)


def increasing_root(fun: Callable[[FloatArray], tuple[FloatArray, FloatArray]], lo: FloatArray,
                    hi: FloatArray, scale: float = 0.0) -> FloatArray:
    """Root in [lo, hi] of an increasing function; ``fun(v)`` returns (value, slope).

    Newton steps, replaced by bisection whenever they leave the bracket the
    signs have established; converged when a step is below
    IAST_RELATIVE_TOLERANCE * max(|v|, scale). nan where the bracket does not
    hold a sign change.
    """
    f_lo, _ = fun(lo)
    f_hi, _ = fun(hi)
    ok = (f_lo <= 0) & (f_hi >= 0)
    v = 0.5 * (lo + hi)
    for _ in range(IAST_MAX_ITERATIONS):
        f, slope = fun(v)
        lo = np.where(f < 0, v, lo)
        hi = np.where(f > 0, v, hi)
        with np.errstate(all="ignore"):
            newton = v - f / slope
        inside = np.isfinite(newton) & (newton > lo) & (newton < hi)
        v_next = np.where(f == 0, v, np.where(inside, newton, 0.5 * (lo + hi)))
        done = np.abs(v_next - v) <= IAST_RELATIVE_TOLERANCE * np.maximum(np.abs(v), scale)
        v = v_next
        if np.all(done | ~ok):
            break
    return np.where(ok, v, np.nan)


class _Components:
    """Flattened pure-component fits (one slot per component per mixture row)."""

    def __init__(self, models: list[type[IsothermModel]], params: list[FloatArray],
                 temperature_k: FloatArray, saturation_pressure_pa: FloatArray,
                 analytic: bool = True) -> None:
        self.models = models                      # list of model classes, len S
        self.params = params                      # list of 1-D param arrays
        self.temperature_k = temperature_k        # (S,)
        self.saturation_pressure_pa = saturation_pressure_pa  # (S,)
        self.analytic = analytic
        self.groups: dict[str, tuple[type[IsothermModel], list[int]]] = {}
        for s, model in enumerate(models):
            self.groups.setdefault(model.id, (model, []))[1].append(s)

    def _by_model(self, pressure_pa: FloatArray, what: str) -> FloatArray:
        out = np.full(pressure_pa.shape, np.nan)
        for model, members in self.groups.values():
            slots = np.array(members)
            params = np.array([self.params[s] for s in slots])
            t, p0 = self.temperature_k[slots], self.saturation_pressure_pa[slots]
            if what == "psi":
                out[slots] = spreading_pressure(model, params, t, p0, pressure_pa[slots],
                                                self.analytic)
            else:
                out[slots] = evaluate_model(model, params, t, p0, pressure_pa[slots][:, None])[:, 0]
        return out

    def psi(self, pressure_pa: FloatArray) -> FloatArray:
        return self._by_model(pressure_pa, "psi")

    def loading(self, pressure_pa: FloatArray) -> FloatArray:
        return self._by_model(pressure_pa, "loading")

    def upper_pressure_pa(self, wanted_pa: FloatArray) -> FloatArray:
        """Highest pressure a model may be evaluated at (p0 for p/p0 models)."""
        top = wanted_pa.copy()
        for model, members in self.groups.values():
            if model.relative_pressure:
                slots = np.array(members)
                top[slots] = self.saturation_pressure_pa[slots] * (1.0 - 1e-9)
        return top

    def pressure_at_psi(self, psi: FloatArray, around_pa: FloatArray) -> FloatArray:
        """p_i^0 (S,) at which psi_i equals psi (S,)."""
        lo = np.log(around_pa) - IAST_PRESSURE_SPAN_E_FOLDS
        hi = np.log(self.upper_pressure_pa(around_pa * np.exp(IAST_PRESSURE_SPAN_E_FOLDS)))

        def residual(ln_p: FloatArray) -> tuple[FloatArray, FloatArray]:
            p = np.exp(ln_p)
            return self.psi(p) - psi, self.loading(p)

        return np.exp(increasing_root(residual, lo, hi, scale=1.0))


def solve_iast(components: _Components, gas_mole_fractions: np.ndarray,
               total_pressure_pa: np.ndarray) -> dict[str, np.ndarray]:
    """IAST for R mixtures of N components; slots are row-major (R, N).

    Returns adsorbed mole fractions (R, N), pure-component pressures (R, N) in
    Pa, component loadings (R, N) and total loading (R,) in mol/kg, and the
    reduced spreading pressure (R,) in mol/kg; nan where no solution exists.
    """
    y = np.asarray(gas_mole_fractions, dtype=float)
    r, n = y.shape
    p_total = np.broadcast_to(np.asarray(total_pressure_pa, float)[:, None], (r, n))
    around = p_total.ravel()
    with np.errstate(all="ignore"):
        # at the root every x_i <= 1 (so p_i^0 >= y_i P) and some p_i^0 <= P
        psi_partial = components.psi(np.minimum(y * p_total, components.upper_pressure_pa(
            (y * p_total).ravel()).reshape(r, n)).ravel()).reshape(r, n)
        psi_total = components.psi(components.upper_pressure_pa(around)
                                   .clip(max=around)).reshape(r, n)
        # widened a little: the root sits on an end when components coincide
        psi_lo = np.max(psi_partial, axis=1) * (1.0 - 1e-9)
        psi_hi = np.max(psi_total, axis=1) * (1.0 + 1e-9)

        def excess(psi: FloatArray) -> tuple[FloatArray, FloatArray]:
            p0 = components.pressure_at_psi(np.repeat(psi, n), around).reshape(r, n)
            x = y * p_total / p0
            q0 = components.loading(p0.ravel()).reshape(r, n)
            return 1.0 - x.sum(axis=1), np.sum(x / q0, axis=1)

        psi = increasing_root(excess, psi_lo, psi_hi)
        p0 = components.pressure_at_psi(np.repeat(psi, n), around).reshape(r, n)
        x = y * p_total / p0
        x = x / x.sum(axis=1, keepdims=True)  # remove the last rounding in sum(x) = 1
        q0 = components.loading(p0.ravel()).reshape(r, n)
        q_total = 1.0 / np.sum(x / q0, axis=1)
    return {"adsorbed_mole_fractions": x, "pure_component_pressures_pa": p0,
            "loadings_mol_per_kg": x * q_total[:, None], "total_loading_mol_per_kg": q_total,
            "reduced_spreading_pressure_mol_per_kg": psi}


# (request, sorbent_id, isotherm rows or None, flags)
_Plan = tuple[MixtureRequest, str | None, IntArray | None, list[str]]


def _same_gas(a: str, b: str) -> bool:
    ka, kb = lookup(a), lookup(b)
    if ka is not None and kb is not None:
        return ka.id == kb.id
    return a.strip().lower() == b.strip().lower()


def _request_is_valid(req: MixtureRequest) -> bool:
    y = np.asarray(req.mole_fractions, dtype=float)
    return (len(req.components) >= 2 and y.shape == (len(req.components),)
            and bool(np.all(np.isfinite(y) & (y > 0))) and abs(y.sum() - 1.0) <= 1e-6
            and np.isfinite(req.total_pressure_pa) and req.total_pressure_pa > 0
            and np.isfinite(req.temperature_k) and req.temperature_k > 0)


def iast_rows(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
              mixtures: list[MixtureRequest], usable: np.ndarray) -> list[dict]:
    """One row per (mixture request, sorbent) with the IAST solution or nan + flags."""
    adsorption = np.array([b == "adsorption" for b in packed.branches], dtype=bool)
    candidates = usable & adsorption
    planned: list[_Plan] = []
    for req in mixtures:
        if not _request_is_valid(req):
            planned.append((req, req.sorbent_id, None, ["iast_invalid_request"]))
            continue
        near_t = candidates & (np.abs(packed.temperature_k - req.temperature_k)
                               <= SAME_TEMPERATURE_TOLERANCE_K)
        by_sorbent = rows_by(packed.sorbent_ids, np.flatnonzero(near_t))
        sorbents = [req.sorbent_id] if req.sorbent_id is not None else sorted(by_sorbent)
        for sorbent_id in sorbents:
            members: list[int | None] = []
            for gas in req.components:
                match = [i for i in by_sorbent.get(sorbent_id, [])
                         if _same_gas(packed.adsorbates[i], gas)]
                members.append(match[0] if match else None)  # first isotherm of the batch
            if all(i is not None for i in members):
                planned.append((req, sorbent_id, np.array(members), []))
            elif req.sorbent_id is not None:
                planned.append((req, sorbent_id, None, ["iast_missing_component"]))

    solutions = _solve_planned(packed, fits, selection, planned)
    _, p_high = measured_pressure_range(packed)
    out = []
    for k, (req, plan_sorbent_id, rows, flags) in enumerate(planned):
        n = len(req.components)
        row: dict[str, Any] = {
            "sorbent_id": plan_sorbent_id,
            "adsorbate": "/".join(req.components),
            "adsorbates": list(req.components),
            "kind": "iast",
            "temperature_k": float(req.temperature_k),
            "total_pressure_pa": float(req.total_pressure_pa),
            "gas_mole_fractions": [float(v) for v in req.mole_fractions],
            "isotherm_ids": None,
            "models": None,
            "adsorbed_mole_fractions": [np.nan] * n,
            "loadings_mol_per_kg": [np.nan] * n,
            "pure_component_pressures_pa": [np.nan] * n,
            "total_loading_mol_per_kg": np.nan,
            "reduced_spreading_pressure_mol_per_kg": np.nan,
            "selectivity": np.nan,
            "flags": list(flags),
        }
        if rows is not None:
            sol = solutions[k]
            x, p0 = sol["adsorbed_mole_fractions"], sol["pure_component_pressures_pa"]
            y = np.asarray(req.mole_fractions, dtype=float)
            row.update({
                "isotherm_ids": [packed.isotherm_ids[i] for i in rows],
                "models": [selection.best[i] for i in rows],
                "adsorbed_mole_fractions": [float(v) for v in x],
                "loadings_mol_per_kg": [float(v) for v in sol["loadings_mol_per_kg"]],
                "pure_component_pressures_pa": [float(v) for v in p0],
                "total_loading_mol_per_kg": float(sol["total_loading_mol_per_kg"]),
                "reduced_spreading_pressure_mol_per_kg":
                    float(sol["reduced_spreading_pressure_mol_per_kg"]),
                # first component over the second
                "selectivity": float((x[0] / x[1]) / (y[0] / y[1])),
            })
            if not np.all(np.isfinite(x)):
                row["flags"].append("iast_no_solution")
            if np.any(p0 > p_high[rows]):
                row["flags"].append("iast_extrapolated")
        out.append(row)
    return out


def _solve_planned(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                   planned: list[_Plan]) -> dict[int, dict[str, Any]]:
    """Solutions keyed by index into ``planned``, all mixtures of one component
    count solved together."""
    solutions: dict[int, dict[str, Any]] = {}
    by_size: dict[int, list[int]] = {}
    for k, plan in enumerate(planned):
        if plan[2] is not None:
            by_size.setdefault(len(plan[2]), []).append(k)
    for indices in by_size.values():
        plans = [planned[k] for k in indices]
        slots = np.concatenate([plan[2] for plan in plans if plan[2] is not None])
        models = [CATALOGUE[selection.best[i]] for i in slots]
        params = [fits[selection.best[i]].params[i] for i in slots]
        components = _Components(models, params, packed.temperature_k[slots],
                                 packed.saturation_pressure_pa[slots])
        y = np.array([plan[0].mole_fractions for plan in plans], dtype=float)
        p_total = np.array([plan[0].total_pressure_pa for plan in plans], dtype=float)
        sol = solve_iast(components, y, p_total)
        for j, k in enumerate(indices):
            solutions[k] = {key: value[j] for key, value in sol.items()}
    return solutions
