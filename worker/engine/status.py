"""Row status codes inside the solver, and the reason each one reports."""
from __future__ import annotations

import numpy as np

RUNNING, CONVERGED, MAX_ITER, SINGULAR, NONFINITE, STALLED, DRIFTING, MERGED = range(8)
STATUS_REASON = np.array([
    "running",
    "converged",
    "max iterations",
    "singular jacobian",
    "non-finite model values",
    "stalled: no step lowers the sum of squares",
    "parameter drifting to bound",  # completed with names and limits per row
    "merged: another seed of this isotherm reaches the same minimum with a lower sum of squares",
], dtype=object)
