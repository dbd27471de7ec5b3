"""The shared form every reader produces, and the vocabulary of columns and limits.

Each reader (csv.py, json.py, parquet.py, table.py) turns its input into one ``Rows``:
column-wise arrays, one entry per point, that assemble.py then checks and converts
without caring where they came from.

Codes of a text column
----------------------
A text column is stored dictionary-encoded (``Text``): ``codes[i]`` is the index of
row i's value in ``values``, or a negative code when the row has no usable value:
``BLANK`` (absent or empty) or ``WRONG_TYPE`` (not text; reported where it was read).
A per-value table is never indexed with these codes directly -- a negative index
would silently pick an entry from the end -- but through ``per_row``, which gives
rows without a value an explicit ``missing`` entry.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from collections.abc import Sequence
from typing import Any, Callable, overload

import numpy as np

from .. import units
from ..arrays import BoolArray, FloatArray, IntArray, ObjectArray


@dataclass(frozen=True)
class Limits:
    max_isotherms: int = 20_000
    max_points_per_isotherm: int = 2_000
    max_columns: int = 64
    max_bytes: int = 256 * 1024 * 1024
    max_json_depth: int = 32
    # points (rows) of one batch: intake holds ~350 bytes per row at its peak, so 2 M rows
    # keep one intake under ~0.7 GB (a 20 M-row Parquet file peaked at 6.9 GB)
    max_points: int = 2_000_000
    # JSON costs ~44x its size in memory while parsed (Python objects per number), so its
    # bodies are held far below max_bytes; CSV and Parquet are read column-wise by Arrow
    max_json_bytes: int = 8 * 1024 * 1024

    @classmethod
    def for_local_files(cls) -> "Limits":
        """Limits for files read on one's own machine (``sorbrank fit``/``plot``):
        far above what the HTTP service accepts from a client."""
        return cls(max_isotherms=10_000_000, max_bytes=16 * 1024**3, max_points=1_000_000_000,
                   max_json_bytes=16 * 1024**3)

    @property
    def max_rows(self) -> int:
        """Most rows (points) a batch may have."""
        return min(self.max_points, self.max_isotherms * self.max_points_per_isotherm)


IDENTITY_COLUMNS = ("sorbent_id", "adsorbate", "temperature_k")


QUANTITIES = tuple(units.QUANTITY_KIND)            # columns that carry a unit


REQUIRED_QUANTITIES = ("pressure", "loading")


PLAIN_COLUMNS = IDENTITY_COLUMNS + ("isotherm_id", "branch", "sample_mass_g", "surface_area_m2_per_g")


TEXT_FIELDS = ("sorbent_id", "adsorbate", "isotherm_id", "branch")


# internal per-row text columns holding each quantity's canonical unit name
UNIT_FIELD = {q: f"unit:{q}" for q in QUANTITIES}


NUMBER_FIELDS = ("temperature_k", "pressure", "loading", "saturation_pressure",
                 "sample_mass_g", "loading_sigma", "surface_area_m2_per_g")


SETTINGS = ("units", "sample_mass_g", "batch_label", "gases")


UNITS_HINT = ("name the unit in the column (e.g. pressure_kpa, loading_mmol_per_g) or declare "
               "it once with units (e.g. '# units: pressure:kPa,loading:mmol/g')")


# spellings of earlier versions: refused, with the new spelling in the message
OLD_SPELLINGS = {
    "material_id": "sorbent_id",
    "pressure_unit": "a unit in the column name (e.g. pressure_kpa) or one units declaration "
                     "(e.g. '# units: pressure:kPa,loading:mmol/g')",
    "loading_unit": "a unit in the column name (e.g. loading_mmol_per_g) or one units declaration "
                    "(e.g. '# units: pressure:kPa,loading:mmol/g')",
    "sigma": "loading_sigma (in the loading's unit) or loading_sigma_<unit>, e.g. "
             "loading_sigma_mmol_per_g",
    "defaults": "the top-level 'units' (e.g. {\"pressure\": \"kPa\", \"loading\": \"mmol/g\"}) "
                "and 'sample_mass_g'",
}


BRANCHES = ("adsorption", "desorption")


MAX_ID_CHARS = 200


MAX_ISSUES_PER_ISOTHERM = 25


NON_MONOTONIC_FRACTION = 0.02


NON_MONOTONIC_SIGMAS = 3.0


# problem codes of a number cell
OK, MISSING, NOT_NUMBER, NOT_FINITE = 0, 1, 2, 3


# text codes below zero: the row has no usable value (module docstring)
BLANK, WRONG_TYPE = -1, -3


@overload
def per_row(codes: IntArray, per_value: Sequence[bool], missing: bool,
            dtype: type[bool]) -> BoolArray: ...
@overload
def per_row(codes: IntArray, per_value: Sequence[int], missing: int,
            dtype: type[np.int64]) -> IntArray: ...
@overload
def per_row(codes: IntArray, per_value: Sequence[float], missing: float,
            dtype: type[float]) -> FloatArray: ...
def per_row(codes: IntArray, per_value: Sequence[float], missing: float,
            dtype: type[bool] | type[np.int64] | type[float]) -> BoolArray | IntArray | FloatArray:
    """Per row: ``per_value[code]``, and ``missing`` where the code is negative (no value:
    ``BLANK``, ``WRONG_TYPE``, or -1 for "none" in an index array)."""
    table = np.append(np.asarray(per_value, dtype=dtype), np.asarray(missing, dtype=dtype))
    return table[np.where(codes >= 0, codes, table.size - 1)]


@dataclass
class Text:
    codes: IntArray            # per row: index into values, BLANK or WRONG_TYPE
    values: list[str]


@dataclass
class Numbers:
    value: FloatArray          # nan unless problem == OK
    problem: IntArray          # int8 problem code per row
    raw: Callable[[int], Any]  # row -> value as sent, for messages


@dataclass
class Rows:
    source: str
    n_rows: int
    text: dict[str, Text]
    numbers: dict[str, Numbers]
    row_label: IntArray | ObjectArray
    group: IntArray | None = None              # JSON: isotherm index per row
    n_groups: int = 0
    group_names: list[str] | None = None
    isotherm_level: frozenset[str] = frozenset()    # fields reported with row None
    group_issues: list[tuple[int, str | None, str, str]] = field(default_factory=list)
    settings: dict[str, Any] = field(default_factory=dict)
    column_names: dict[str, str] = field(default_factory=dict)   # internal name -> as sent
    group_column_names: list[dict[str, str]] | None = None        # JSON: the same per isotherm
    decimal: str = "."
    # JSON: the top-level conditions and mixtures as sent, read after assembly
    requests: dict[str, Any] | None = None

    @overload
    def field_name(self, fld: str, g: int) -> str: ...
    @overload
    def field_name(self, fld: None, g: int) -> None: ...
    def field_name(self, fld: str | None, g: int) -> str | None:
        """The column (or JSON key) the sender used for internal field ``fld``."""
        if fld is None:
            return None
        names = self.group_column_names[g] if self.group_column_names is not None \
            else self.column_names
        return names.get(fld, fld)

