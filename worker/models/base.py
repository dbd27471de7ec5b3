"""The shape every catalogue model follows.

A model is a small declarative class: its parameters (name, canonical unit,
bounds, meaning), a static ``evaluate`` and an analytic ``jacobian`` that
broadcast over a leading batch axis, a batch initial-guess rule, its Henry
limit where defined, and its capabilities as class attributes that the
metrics read instead of lists of model ids:

* ``capacity_params``: the parameters whose sum is the saturation capacity
  (empty: no finite plateau, so no capacity of its own);
* ``multilayer`` / ``pore_filling``: what the high-pressure end means;
* ``henry_slope_from_exponent``: the p -> 0 slope is set by a fitted exponent;
* ``reduced_spreading_pressure``: the closed-form IAST integral, where one exists;
* ``in_default_catalogue``: fitted by ``models="all"`` (False: only when named).

Shapes used throughout (n = isotherms in the batch, m = padded points):

* ``x``            (n, m)  pressure in Pa, or p/p0 when ``relative_pressure``
* ``temperature_k`` (n, 1)  temperature of each isotherm
* each parameter   (n, 1)  so that ``evaluate`` broadcasts to (n, m)
* ``mask``         (n, m)  True where a point is real (not padding)

Padding points carry a harmless in-range ``x`` (the engine repeats the last
real point) so models never see zeros or NaN they did not ask for.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, ClassVar

import numpy as np


@dataclass(frozen=True)
class Param:
    name: str
    unit: str
    lower: float
    upper: float
    meaning: str
    # positive scale parameters spanning decades are fitted in log space by
    # the engine; this only declares the fact, it does not change the result
    log_scale: bool = False

    @property
    def positive(self) -> bool:
        """Positive by nature: the model bounds it at or above zero (capacities,
        affinities, Henry constants, bounded exponents). Its 95 % interval is
        built on the log scale and never goes below zero (docs/results.md)."""
        return self.lower >= 0


class IsothermModel:
    """Base class; subclasses declare class attributes and implement statics."""

    id: ClassVar[str]
    title: ClassVar[str]
    equation: ClassVar[str]          # plain text, canonical units
    reference: ClassVar[str]
    params: ClassVar[tuple[Param, ...]]
    relative_pressure: ClassVar[bool] = False  # True: x is p/p0, needs p0
    # True for multilayer models (BET, GAB): loading grows without a plateau
    # towards p0, so no saturation capacity exists for the isotherm at all
    multilayer: ClassVar[bool] = False
    # True for pore-filling models (Dubinin family): the capacity is the filled
    # micropore volume at p0, not a monolayer, so it gives no site count
    pore_filling: ClassVar[bool] = False
    # names of the parameters whose sum is the saturation capacity in mol/kg
    # (the sites of a multi-site model add up); empty when the model has no
    # finite plateau (Henry, Freundlich, Temkin, Redlich-Peterson, whose
    # plateau exists only at the edge beta = 1) or whose monolayer is no
    # saturation (BET, GAB). It decides q_sat_from_other_model.
    capacity_params: ClassVar[tuple[str, ...]] = ()
    # True when the p -> 0 slope is governed by a fitted heterogeneity
    # exponent: the Henry limit then counts only where the data reach the
    # Henry region (metrics/henry.py)
    henry_slope_from_exponent: ClassVar[bool] = False
    # psi(p, *params) = integral_0^p q(t)/t dt in mol/kg, in closed form, as a
    # staticmethod; None: IAST integrates the model numerically
    reduced_spreading_pressure: ClassVar[Callable[..., np.ndarray] | None] = None
    # False for an opt-in model, fitted only where a caller names it: a model
    # added this way changes no selection made by the default set before it
    in_default_catalogue: ClassVar[bool] = True

    # Each model defines both as staticmethods naming its parameters after x and
    # temperature_k: evaluate(x, temperature_k, q_sat, affinity) -> loading (n, m);
    # jacobian(...) -> d loading / d param, one array per parameter, each
    # broadcasting to x. Declared as callables, not methods, so that a model's
    # own parameter names are no signature clash for the type checker.
    evaluate: ClassVar[Callable[..., np.ndarray]]
    jacobian: ClassVar[Callable[..., tuple[np.ndarray, ...]]]

    @classmethod
    def initial_guesses(cls, x: np.ndarray, q: np.ndarray, mask: np.ndarray,
                        temperature_k: np.ndarray) -> np.ndarray:
        """Seeds for the whole batch: array (n_seeds, n, n_params), inside bounds."""
        raise NotImplementedError

    @classmethod
    def defines_saturation_capacity(cls) -> bool:
        """True when the model has a finite plateau of its own (``capacity_params``)."""
        return bool(cls.capacity_params)

    @classmethod
    def has_closed_form_spreading_pressure(cls) -> bool:
        return cls.reduced_spreading_pressure is not None

    @classmethod
    def defines_henry_limit(cls) -> bool:
        """True when the model defines its own ``henry_constant`` (entries may
        still be inf or nan for some parameters)."""
        owner = next(k for k in cls.__mro__ if "henry_constant" in vars(k))
        return owner is not IsothermModel

    @classmethod
    def saturation_capacity(cls, params: np.ndarray) -> np.ndarray | None:
        """Saturation capacity (n,) in mol/kg from params (n, k): the sum of the
        ``capacity_params``; None when the model declares none."""
        if not cls.capacity_params:
            return None
        names = cls.param_names()
        capacity = params[:, names.index(cls.capacity_params[0])].copy()
        for name in cls.capacity_params[1:]:
            capacity += params[:, names.index(name)]
        return capacity

    @classmethod
    def henry_constant(cls, params: np.ndarray, temperature_k: np.ndarray,
                       saturation_pressure_pa: np.ndarray | None = None) -> np.ndarray | None:
        """dq/dp at p -> 0 in mol/kg/Pa from params (n, k); None if undefined.

        Entries may be inf (the model's slope diverges at zero, e.g.
        Freundlich with n > 1) or nan (not defined for that isotherm).
        """
        return None

    @classmethod
    def canonical(cls, params: np.ndarray) -> np.ndarray:
        """Put fitted params (n, k) in a canonical order (e.g. dual-site models
        list the stronger site first). The engine calls it after fitting; the
        default is the identity."""
        return params

    # -- helpers shared by every model -------------------------------------
    @classmethod
    def param_names(cls) -> list[str]:
        return [p.name for p in cls.params]

    @classmethod
    def lower_bounds(cls) -> np.ndarray:
        return np.array([p.lower for p in cls.params], dtype=float)

    @classmethod
    def upper_bounds(cls) -> np.ndarray:
        return np.array([p.upper for p in cls.params], dtype=float)

    @classmethod
    def clip_to_bounds(cls, guesses: np.ndarray) -> np.ndarray:
        """Pull guesses strictly inside the bounds (last axis = parameters)."""
        lo, hi = cls.lower_bounds(), cls.upper_bounds()
        span = np.where(np.isfinite(hi - lo), hi - lo, np.abs(lo) + 1.0)
        eps = 1e-9 * np.maximum(span, 1e-300)
        inner_lo = np.where(np.isfinite(lo), lo + eps, -np.inf)
        inner_hi = np.where(np.isfinite(hi), hi - eps, np.inf)
        # log-scale parameters span decades (an affinity may be 1e-9 1/Pa), so
        # their margin is relative: an absolute 1e-9 would swamp small values
        log_scale = np.array([p.log_scale for p in cls.params], dtype=bool)
        log_lo = np.where(lo > 0, lo * (1.0 + 1e-9), np.finfo(float).tiny)
        inner_lo = np.where(log_scale & (lo >= 0), log_lo, inner_lo)
        inner_hi = np.where(log_scale & np.isfinite(hi) & (hi > 0), hi * (1.0 - 1e-9), inner_hi)
        out = np.where(np.isfinite(guesses), guesses, np.where(np.isfinite(lo), inner_lo, 1.0))
        return np.clip(out, inner_lo, inner_hi)

    @classmethod
    def describe(cls) -> dict:
        """A JSON-able description for the catalogue endpoint."""
        return {
            "id": cls.id,
            "title": cls.title,
            "equation": cls.equation,
            "reference": cls.reference,
            "relative_pressure": cls.relative_pressure,
            "multilayer": cls.multilayer,
            "pore_filling": cls.pore_filling,
            "in_default_catalogue": cls.in_default_catalogue,
            "parameters": [
                {
                    "name": p.name,
                    "unit": p.unit,
                    "lower": _json_bound(p.lower),
                    "upper": _json_bound(p.upper),
                    "meaning": p.meaning,
                }
                for p in cls.params
            ],
            "has_saturation_capacity": cls.defines_saturation_capacity(),
            "has_henry_limit": cls.defines_henry_limit(),
        }


def _json_bound(v: float) -> float | None:
    return None if not np.isfinite(v) else float(v)


def masked_max(values: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Row-wise maximum over real points, shape (n, 1)."""
    return np.max(np.where(mask, values, -np.inf), axis=1, keepdims=True)


def masked_min(values: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Row-wise minimum over real points, shape (n, 1)."""
    return np.min(np.where(mask, values, np.inf), axis=1, keepdims=True)
