"""Goodness of fit of each isotherm's selected model: pure error and lack of fit
from replicate pressures, and the runs test of the residual signs.

Rules (docs/results.md, "Replicates, pure error and lack of fit" and
"Goodness of fit"):

* Pure error: the scatter of replicates (points at exactly one pressure)
  about their own mean, pooled over the isotherm's pressures; its degrees of
  freedom are n - c (n points, c distinct pressures).
* Lack of fit (Draper & Smith, Applied Regression Analysis, ch. 2): the
  residual sum of squares splits into pure error and lack of fit,
  F = [(SSE - SS_pe) / (c - k)] / [SS_pe / (n - c)] with k the model's
  parameter count, p = P(F(c - k, n - c) > F). Flag ``lack_of_fit`` at
  p < LEVEL. Sums of squares use the fit's weights.
* Runs test (Wald & Wolfowitz 1940; exact distribution of Swed & Eisenhart
  1943): the signs of the residual at each distinct pressure (the weighted
  mean residual of its replicates), in pressure order. Too few runs means
  the curve lies on one side of the data over stretches: p = P(R <= r)
  under random signs, exact for up to EXACT_RUNS_MAX signs, the normal
  approximation with continuity correction above.
* ``systematic_misfit``: where the lack-of-fit test exists, its p < LEVEL;
  elsewhere the runs test's p < LEVEL. One test per isotherm keeps the
  rate on a correct model at the stated level.
"""
from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import fdtrc, gammaln, ndtr

from ..engine import sigma_mol_per_kg
from ..packing import Packed
from ..results import ModelFits, Selection
from .common import add_flag, selected_groups, selected_loading

LEVEL = 0.05
EXACT_RUNS_MAX = 60


def fit_quality_columns(packed: Packed, fits: dict[str, ModelFits], selection: Selection,
                        flags: list[list[str]], weighting: str = "uniform") -> dict[str, np.ndarray]:
    """Pure-error, lack-of-fit and runs-test columns (n,) of the selected model;
    adds the ``lack_of_fit`` and ``systematic_misfit`` flags."""
    n = packed.n
    mask = packed.mask
    q = packed.loading_mol_per_kg
    with np.errstate(all="ignore"):
        weight = np.where(mask, 1.0 / sigma_mol_per_kg(packed, weighting) ** 2, 0.0)
    weight = np.where(np.isfinite(weight), weight, 0.0)
    block, n_blocks = _pressure_blocks(packed)
    flat = block.ravel()[mask.ravel()]

    def per_block(values: np.ndarray) -> np.ndarray:
        return np.bincount(flat, weights=values.ravel()[mask.ravel()], minlength=n_blocks)

    owner = np.repeat(np.arange(n), mask.shape[1]).reshape(mask.shape)
    block_row = np.zeros(n_blocks, dtype=np.int64)
    block_row[flat] = owner.ravel()[mask.ravel()]
    n_distinct = np.bincount(block_row, minlength=n) if n_blocks else np.zeros(n, dtype=np.int64)
    n_points = mask.sum(axis=1)
    pure_dof = n_points - n_distinct

    with np.errstate(all="ignore"):
        w_block = per_block(weight)
        mean_w = per_block(weight * q) / w_block
        mean = per_block(q) / per_block(np.ones_like(q))
        dev_w = np.where(mask, q - mean_w[block], 0.0)
        dev = np.where(mask, q - mean[block], 0.0)
        ss_pure_w = np.bincount(block_row, weights=per_block(weight * dev_w ** 2), minlength=n)
        ss_pure = np.bincount(block_row, weights=per_block(dev ** 2), minlength=n)
        pure_variance = np.where(pure_dof > 0, ss_pure / pure_dof, np.nan)

    model_q = selected_loading(packed, fits, selection, packed.pressure_pa)
    residual = np.where(mask, q - model_q, 0.0)
    n_params = np.full(n, -1, dtype=np.int64)
    for model, _, rows in selected_groups(selection, fits):
        n_params[rows] = len(model.params)
    usable = (n_params > 0) & np.all(np.isfinite(model_q) | ~mask, axis=1)

    with np.errstate(all="ignore"):
        sse = np.einsum("ij,ij->i", weight * residual, residual)
        lof_dof = n_distinct - n_params
        testable = usable & (pure_dof > 0) & (lof_dof > 0) & (ss_pure_w > 0)
        f_stat = np.where(testable, ((sse - ss_pure_w) / lof_dof) / (ss_pure_w / pure_dof), np.nan)
        f_stat = np.where(testable, np.maximum(f_stat, 0.0), np.nan)
        lof_p = np.where(testable, fdtrc(np.maximum(lof_dof, 1), np.maximum(pure_dof, 1),
                                         np.nan_to_num(f_stat)), np.nan)
        block_residual = per_block(weight * residual) / w_block

    runs, n_pos, n_neg = _runs(block_residual, block_row, n)
    runs_p = np.where(usable, runs_test_p(runs, n_pos, n_neg), np.nan)
    lack = testable & (lof_p < LEVEL)
    misfit = np.where(testable, lack, usable & (runs_p < LEVEL))
    add_flag(flags, lack, "lack_of_fit")
    add_flag(flags, misfit, "systematic_misfit")
    return {
        "replicate_points": (n_points - n_distinct).astype(np.int64),
        "pure_error_variance_mol2_per_kg2": pure_variance,
        "pure_error_dof": np.where(pure_dof > 0, pure_dof, 0).astype(np.int64),
        "lack_of_fit_f": f_stat,
        "lack_of_fit_dof_model": np.where(testable, lof_dof, 0).astype(np.int64),
        "lack_of_fit_dof_pure_error": np.where(testable, pure_dof, 0).astype(np.int64),
        "lack_of_fit_p": lof_p,
        "residual_runs": np.where(usable, runs, 0).astype(np.int64),
        "residual_runs_p": runs_p,
    }


def _pressure_blocks(packed: Packed) -> tuple[np.ndarray, int]:
    """Block index (n, m) of every real point: one block per (isotherm, distinct
    pressure), numbered consecutively; intake sorts points by pressure."""
    p, mask = packed.pressure_pa, packed.mask
    new = mask.copy()
    new[:, 1:] &= p[:, 1:] != p[:, :-1]
    count = np.cumsum(new.ravel())
    return (count - 1).reshape(p.shape), int(count[-1]) if count.size else 0


def _runs(block_residual: np.ndarray, block_row: np.ndarray, n: int
          ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per isotherm: runs of equal sign, positive and negative count of the block
    residuals in pressure order (zero residuals are left out)."""
    sign = np.sign(np.nan_to_num(block_residual))
    keep = sign != 0
    s, row = sign[keep], block_row[keep]
    n_pos = np.bincount(row, weights=s > 0, minlength=n).astype(np.int64)
    n_neg = np.bincount(row, weights=s < 0, minlength=n).astype(np.int64)
    starts = np.ones(s.size, dtype=bool)
    starts[1:] = (row[1:] != row[:-1]) | (s[1:] != s[:-1])
    runs = np.bincount(row, weights=starts, minlength=n).astype(np.int64)
    return runs, n_pos, n_neg


def runs_test_p(runs: ArrayLike, n_pos: ArrayLike, n_neg: ArrayLike) -> np.ndarray:
    """One-sided p = P(R <= runs) of the number of runs R of n_pos + and n_neg -
    signs in random order; nan where either count is zero."""
    runs, n1, n2 = (np.asarray(a, dtype=np.int64) for a in (runs, n_pos, n_neg))
    out = np.full(runs.shape, np.nan)
    ok = (n1 > 0) & (n2 > 0)
    total = n1 + n2
    exact = ok & (total <= EXACT_RUNS_MAX)
    if exact.any():
        out[exact] = _exact_runs_cdf(runs[exact], n1[exact], n2[exact])
    approx = ok & ~exact
    if approx.any():
        a, b, r = n1[approx].astype(float), n2[approx].astype(float), runs[approx].astype(float)
        mean = 1.0 + 2.0 * a * b / (a + b)
        var = 2.0 * a * b * (2.0 * a * b - a - b) / ((a + b) ** 2 * (a + b - 1.0))
        out[approx] = ndtr((r - mean) / np.sqrt(var))
    return out


def _log_comb(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """ln C(a, b), -inf where b < 0 or b > a."""
    with np.errstate(all="ignore"):
        value = gammaln(a + 1.0) - gammaln(b + 1.0) - gammaln(a - b + 1.0)
    return np.where((b >= 0) & (b <= a), value, -np.inf)


def _exact_runs_cdf(runs: np.ndarray, n1: np.ndarray, n2: np.ndarray) -> np.ndarray:
    """P(R <= runs) by the exact run-count distribution (Swed & Eisenhart 1943):
    P(R = 2j) = 2 C(n1-1, j-1) C(n2-1, j-1) / C(n1+n2, n1),
    P(R = 2j+1) = [C(n1-1, j-1) C(n2-1, j) + C(n1-1, j) C(n2-1, j-1)] / C(n1+n2, n1)."""
    n1, n2 = n1[:, None].astype(float), n2[:, None].astype(float)
    r = np.arange(2, EXACT_RUNS_MAX + 2)[None, :].astype(float)
    j = np.floor(r / 2.0)
    even = r % 2 == 0
    log_all = _log_comb(n1 + n2, n1)
    with np.errstate(all="ignore"):
        p_even = 2.0 * np.exp(_log_comb(n1 - 1, j - 1) + _log_comb(n2 - 1, j - 1) - log_all)
        p_odd = np.exp(_log_comb(n1 - 1, j - 1) + _log_comb(n2 - 1, j) - log_all) \
            + np.exp(_log_comb(n1 - 1, j) + _log_comb(n2 - 1, j - 1) - log_all)
    prob = np.where(even, p_even, p_odd)
    below = np.where(r < runs[:, None], prob, 0.0).sum(axis=1)
    at = np.where(r == runs[:, None], prob, 0.0).sum(axis=1)
    return np.minimum(below + 0.5 * at, 1.0)
