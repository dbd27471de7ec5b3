"""Columnar result types: per-model fits and per-isotherm selection.

Arrays, not per-isotherm objects, so a million isotherms stay a handful of
numpy arrays; the JSON contract of ``sorbrank fit`` is a view built from them.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class ModelFits:
    """One model fitted to n isotherms (k = number of parameters).

    A failure is data: ``converged`` False with a ``reason``; parameters and
    statistics are nan where a fit failed or the model does not apply.
    """

    model_id: str
    param_names: list[str]
    params: np.ndarray          # (n, k)
    stderr: np.ndarray          # (n, k)
    ci95_low: np.ndarray        # (n, k)
    ci95_high: np.ndarray       # (n, k)
    covariance: np.ndarray      # (n, k, k)
    sse: np.ndarray             # (n,)  weighted sum of squared residuals
    rmse: np.ndarray            # (n,)
    r2: np.ndarray              # (n,)
    aic: np.ndarray             # (n,)
    aicc: np.ndarray            # (n,)
    bic: np.ndarray             # (n,)
    n_params: int
    converged: np.ndarray       # (n,) bool
    reason: np.ndarray          # (n,) object (str)
    at_bound: np.ndarray        # (n, k) bool
    applicable: np.ndarray      # (n,) bool, False e.g. for p/p0 models without p0
    n_points: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))  # (n,)
    # goodness of fit against calibrated (absolute) sigma: chi-square = sse,
    # its degrees of freedom n - k and upper-tail p-value; nan for rows whose
    # sigma was not taken as absolute (the default). None = all nan: typed as
    # the arrays they are once __post_init__ has replaced a None.
    chi_square: np.ndarray = None  # type: ignore[assignment]          # (n,)
    chi_square_dof: np.ndarray = None  # type: ignore[assignment]      # (n,)
    chi_square_p_value: np.ndarray = None  # type: ignore[assignment]  # (n,)

    def __post_init__(self) -> None:
        for name in ("chi_square", "chi_square_dof", "chi_square_p_value"):
            if getattr(self, name) is None:
                setattr(self, name, np.full(self.params.shape[0], np.nan))

    @property
    def n(self) -> int:
        return self.params.shape[0]


@dataclass
class Selection:
    """Which model each isotherm's data support."""

    criterion: str                 # "aicc" | "aic" | "bic"
    model_ids: list[str]           # column order of ``weights``
    best: np.ndarray               # (n,) object: model id or None
    weights: np.ndarray            # (n, n_models) Akaike (or BIC) weights, 0 for excluded
    ambiguous: np.ndarray          # (n,) bool
    runner_up: np.ndarray          # (n,) object: model id or None
    delta_runner_up: np.ndarray    # (n,) criterion difference to the runner-up (nan if none)
    excluded: dict[str, np.ndarray]  # model id -> (n,) object reason ("" = eligible)
