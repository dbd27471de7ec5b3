"""The solver's tolerances and switches, in one documented object.

Every caller uses the defaults; tests and benchmarks pass other values to
compare (merging on and off, the projection on and off, a small working set).
"""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class SolverOptions:
    """Tolerances and switches of the batch Levenberg-Marquardt solver.

    The relative tolerances compare the Gauss-Newton predicted SSE reduction
    from a row's current point with that row's SSE (see the package notes).
    """

    max_iter: int = 200
    """Iterations a row (one isotherm, one seed) may use before it stops as not converged."""

    gn_rel_tol: float = 1e-18
    """Gauss-Newton predicted reduction / SSE at which a row has converged."""

    exact_rel_tol: float = 1e-28
    """SSE / sum(w q^2) below which the data are fitted exactly."""

    polish_rel_tol: float = 1e-8
    """Below this GN reduction / SSE the solver is in the quadratic regime."""

    loose_rel_tol: float = 1e-10
    """Accepted instead of ``gn_rel_tol`` when rounding stops all progress."""

    influence_rtol: float = 1e-8
    """A parameter moving the curve less than this (relative) is undetermined."""

    max_damping: float = 1e16
    """A row whose damping grows past this without an accepted step has stalled."""

    lambda_init: float = 1e-3
    """Start damping on the Jacobi-scaled normal equations."""

    lambda_min_shrink: float = 1.0 / 3.0
    """The most an accepted step may shrink the damping (Nielsen's update); other
    values of this and ``lambda_init`` were measured and saved no iterations
    (DEVELOPERS.md)."""

    merge_seeds: bool = True
    """Seeds of one isotherm that head for the same minimum are merged (see
    seeds.merged_seeds); False runs every seed to its own end (the result is
    the same; it costs more)."""

    merge_rel_tol: float = 1e-4
    """Merging starts once both seeds are this close to the minimum: GN predicted
    reduction / SSE, i.e. inside the quadratic regime (1e-6 and 1e-4 give the
    same fits on the scale benchmark's mix; 1e-3 changed one)."""

    project_scale: bool = True
    """Trial points of the approach take their best scale (see the package notes);
    False is plain Levenberg-Marquardt throughout (same minima, more iterations)."""

    drift_window: int = 10
    """Iterations between drift checks (see seeds.drift_proof). With the
    best-scale projection a drifting row runs off fast and then crawls; a
    window of 10 iterations and 0.02 decades per window stop such rows early
    without stopping any fit that converges (scale benchmark's mix)."""

    drift_decades: float = 0.02
    """Decades a parameter must move towards one bound in each of the last two
    windows for its row to be a drift suspect."""

    row_block: int = 3072
    """Rows (isotherm, seed) the solver holds at once: small enough that its
    (rows, points) arrays stay in cache, large enough that numpy's per-call
    overhead is amortised (see benchmarks/bench_engine.py --block)."""

    def __post_init__(self) -> None:
        if self.max_iter < 0 or self.drift_window < 1 or self.row_block < 1:
            raise ValueError("max_iter must be >= 0, drift_window and row_block >= 1; got "
                             f"{self.max_iter}, {self.drift_window}, {self.row_block}")


DEFAULT_SOLVER_OPTIONS = SolverOptions()
