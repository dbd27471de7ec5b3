"""Point weights of a fit, and the padded point axis every row is solved on."""
from __future__ import annotations

import numpy as np

from ..arrays import BoolArray, FloatArray
from ..packing import Packed

WEIGHTINGS = ("uniform", "relative", "sigma")
RELATIVE_SIGMA_FLOOR = 1e-3  # "relative": loadings under this share of the row max use the floor


def check_weighting(weighting: str, absolute_sigma: bool = False) -> None:
    """Raise ValueError for an unknown weighting, or absolute sigma without sigma weights."""
    if weighting not in WEIGHTINGS:
        raise ValueError(f"weighting must be one of {', '.join(WEIGHTINGS)}; got {weighting!r}")
    if absolute_sigma and weighting != "sigma":
        raise ValueError("absolute sigma needs weighting 'sigma' (the calibrated sigma of each "
                         f"loading); got weighting {weighting!r}")


def sigma_mol_per_kg(packed: Packed, weighting: str) -> FloatArray:
    """Per-point standard deviation (n, m) for the chosen weighting."""
    q = packed.loading_mol_per_kg
    if weighting == "relative":
        q_abs = np.where(packed.mask, np.abs(q), 0.0)
        floor = RELATIVE_SIGMA_FLOOR * q_abs.max(axis=1, keepdims=True)
        floor = np.where(floor > 0, floor, 1.0)
        return np.maximum(q_abs, floor)
    if weighting == "sigma" and packed.sigma_mol_per_kg is not None:
        return np.where(without_sigma(packed)[:, None], 1.0, packed.sigma_mol_per_kg)
    return np.ones_like(q)


def without_sigma(packed: Packed) -> BoolArray:
    """(n,) bool: the isotherm came without sigma (pack() marks it by a whole nan row)."""
    sigma = packed.sigma_mol_per_kg
    if sigma is None:  # no isotherm of the batch gave sigma
        return np.ones(packed.n, dtype=bool)
    return np.all(np.isnan(sigma) | ~packed.mask, axis=1)


# Row sums (einsum, np.sum) add a row's tail in a different order when the
# padded width changes (blocks of 8 vs a scalar remainder), so a row's last
# bits would depend on the longest isotherm it shares a batch with. Padding
# the point axis to a multiple of this width with zero-weight points makes
# every row's result independent of its company (chunked runs equal the
# serial run bit for bit).
POINT_AXIS_QUANTUM = 8


def canonical_width(x: FloatArray, q: FloatArray, w: FloatArray, mask: BoolArray
                    ) -> tuple[FloatArray, FloatArray, FloatArray, BoolArray]:
    """(x, q, w, mask) padded on the point axis to a multiple of POINT_AXIS_QUANTUM."""
    m = x.shape[1]
    extra = -m % POINT_AXIS_QUANTUM
    if extra == 0 or x.shape[0] == 0:
        return x, q, w, mask
    rep = lambda a: np.concatenate([a, np.repeat(a[:, -1:], extra, axis=1)], axis=1)  # noqa: E731
    return (rep(x), rep(q), np.concatenate([w, np.zeros((w.shape[0], extra))], axis=1),
            np.concatenate([mask, np.zeros((mask.shape[0], extra), dtype=bool)], axis=1))


def last_real(values: FloatArray, mask: BoolArray) -> FloatArray:
    """(n, 1): each row's value at its last real (unpadded) point."""
    last = np.maximum(mask.sum(axis=1) - 1, 0)
    return values[np.arange(values.shape[0]), last][:, None]

