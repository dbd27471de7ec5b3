"""Henry constant: the selected model's slope at p -> 0, else a virial fit of the lowest points."""
from __future__ import annotations

import numpy as np

from ..models.linear import masked_linear_fit
from ..packing import Packed
from ..results import ModelFits, Selection
from .common import add_flag, max_measured_loading, selected_groups

# Virial fall-back: ln(p/q) = -ln K_H + A1 q + ...; the line is fitted to the
# points whose loading is at most this fraction of the highest measured
# loading (and always to the lowest VIRIAL_MIN_POINTS points), where the
# neglected quadratic term biases K_H by about fraction^2 / 12 for Langmuir data.
VIRIAL_MAX_LOADING_FRACTION = 0.25
VIRIAL_MIN_POINTS = 3


def model_henry_constant(packed: Packed, fits: dict[str, ModelFits],
                         selection: Selection) -> np.ndarray:
    """(n,) dq/dp at p -> 0 of the selected model in mol/kg/Pa; nan where undefined."""
    out = np.full(packed.n, np.nan)
    for model, model_fits, rows in selected_groups(selection, fits):
        try:
            with np.errstate(all="ignore"):
                k_h = model.henry_constant(model_fits.params[rows], packed.temperature_k[rows],
                                           packed.saturation_pressure_pa[rows])
        except Exception:  # noqa: BLE001 - a model bug gives nan, not a failed batch
            k_h = None
        if k_h is not None:
            out[rows] = np.broadcast_to(np.asarray(k_h, dtype=float), rows.shape)
    return out


def virial_henry_constant(packed: Packed) -> tuple[np.ndarray, np.ndarray]:
    """(K_H in mol/kg/Pa, points used), each (n,), from ln(p/q) linear in q at low loading."""
    p, q = packed.pressure_pa, packed.loading_mol_per_kg
    usable = packed.mask & (p > 0) & (q > 0)
    rank = np.cumsum(usable, axis=1) - 1
    q_max = max_measured_loading(packed)[:, None]
    low = usable & ((q <= VIRIAL_MAX_LOADING_FRACTION * q_max) | (rank < VIRIAL_MIN_POINTS))
    with np.errstate(divide="ignore", invalid="ignore"):
        ln_p_over_q = np.log(np.where(low, p / np.where(low, q, 1.0), 1.0))
    _, intercept, n_used = masked_linear_fit(q, ln_p_over_q, low)
    with np.errstate(over="ignore"):  # an absurd intercept gives inf: not finite, so unused
        k_h = np.exp(-intercept)
    enough = n_used >= VIRIAL_MIN_POINTS
    return np.where(enough, k_h, np.nan), n_used


def henry_columns(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                  flags: list[list[str]]) -> dict[str, np.ndarray]:
    from_model = model_henry_constant(packed, fits, selection)
    with np.errstate(invalid="ignore"):
        model_ok = np.isfinite(from_model) & (from_model > 0)
    virial, _ = virial_henry_constant(packed)
    with np.errstate(invalid="ignore"):
        virial_ok = np.isfinite(virial) & (virial > 0)
    use_virial = ~model_ok & virial_ok
    henry = np.where(model_ok, from_model, np.where(use_virial, virial, np.nan))
    source = np.full(packed.n, None, dtype=object)
    source[model_ok] = "model"
    source[use_virial] = "virial"
    add_flag(flags, use_virial, "henry_from_virial")
    add_flag(flags, ~model_ok & ~virial_ok, "henry_undetermined")
    return {"henry_mol_per_kg_pa": henry, "henry_source": source}
