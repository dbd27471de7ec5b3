"""Array type names for the worker's signatures (numpy.typing).

Shapes are not part of numpy's types; each function's docstring names them
((n,) per isotherm, (n, m) per point, (k, R) per parameter and solver row).
"""
from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]
IntArray = NDArray[np.integer[Any]]
# ids, names, flags and reasons: numpy object arrays of str (or None)
ObjectArray = NDArray[np.object_]
