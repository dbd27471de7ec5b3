"""Which rows make one isotherm: grouping keys, branches (given, or from the
pressure turning point) and duplicate isotherm ids.
"""
from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..arrays import BoolArray, FloatArray, IntArray
from .rows import BLANK, BRANCHES, OK, Rows, Text, per_row


def group_range(values: FloatArray, given: BoolArray, gid: IntArray,
                n_groups: int) -> tuple[FloatArray, FloatArray]:
    """Per-group (min, max) of ``values`` over rows where ``given``; (inf, -inf) if none."""
    low = np.full(n_groups, np.inf)
    high = np.full(n_groups, -np.inf)
    np.minimum.at(low, gid[given], values[given])
    np.maximum.at(high, gid[given], values[given])
    return low, high


def codes_by_appearance(values: FloatArray | IntArray) -> tuple[IntArray, int]:
    """Small integer codes for ``values`` numbered by first appearance (nan -> -1)."""
    encoded = pc.dictionary_encode(pa.array(values, from_pandas=True))
    codes = encoded.indices.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)
    return codes, len(encoded.dictionary)


def grouping(rows: Rows, branch_key: IntArray) -> tuple[IntArray, int]:
    """Group index per row (groups numbered by first appearance) and group count."""
    if rows.group is not None:
        return rows.group, rows.n_groups
    n = rows.n_rows
    temperature_code, _ = codes_by_appearance(rows.numbers["temperature_k"].value)
    key: IntArray = np.zeros(n, dtype=np.int64)
    for column in (rows.text["sorbent_id"].codes, rows.text["adsorbate"].codes,
                   temperature_code, branch_key):
        # re-coding after each step keeps the combined key below n: no overflow
        shifted = column - column.min()
        key, _ = codes_by_appearance(key * (int(shifted.max()) + 1) + shifted)
    iso = rows.text["isotherm_id"].codes if "isotherm_id" in rows.text else np.full(n, BLANK)
    key = np.where(iso >= 0, iso, iso.max() + 1 + key)  # rows with an isotherm_id group by it alone
    return codes_by_appearance(key)


def branch_codes(column: Text) -> tuple[IntArray, IntArray]:
    """Per row: index into BRANCHES (blank means adsorption, -1 unknown) and the
    grouping key (unknown values keep a key of their own)."""
    branch = per_row(column.codes, [BRANCHES.index(v.lower()) if v.lower() in BRANCHES else -1
                                    for v in column.values], 0, np.int64)
    return branch, np.where(branch >= 0, branch, 2 + column.codes)


# a clear up-then-down sequence: this many distinct pressures on each side of the turn
MIN_BRANCH_PRESSURES = 3


def split_at_turning_point(rows: Rows, text: dict[str, Text], gid: IntArray) -> Text:
    """The branch column with "desorption" on the rows after the pressure turning point
    of every isotherm that qualifies (module docstring: branches from the pressure
    sequence); the column as it was where none does."""
    column = text["branch"]
    pressure = rows.numbers["pressure"]
    n = gid.size
    if n < 2 * MIN_BRANCH_PRESSURES:
        return column
    n_groups = int(gid.max()) + 1
    iso = text["isotherm_id"].codes
    # only isotherms that say nothing about their branch or identity, with every pressure usable
    eligible = np.bincount(gid, weights=(column.codes != BLANK) | (iso >= 0)
                           | (pressure.problem != OK), minlength=n_groups) == 0
    order = np.argsort(gid, kind="stable")        # input order inside each isotherm
    g, p = gid[order], pressure.value[order]
    same = g[1:] == g[:-1]
    rise, fall = same & (p[1:] > p[:-1]), same & (p[1:] < p[:-1])
    # a rise after a fall: not one turn
    falls_so_far = np.cumsum(fall)
    start_of_group = np.concatenate([[0], np.flatnonzero(~same) + 1])
    falls_before_group = np.concatenate([[0], falls_so_far])[start_of_group]
    falls_before = falls_so_far - falls_before_group[g[1:]]
    rise_after_fall = np.bincount(g[1:], weights=rise & (falls_before - fall > 0), minlength=n_groups)
    n_rise = np.bincount(g[1:], weights=rise, minlength=n_groups)
    n_fall = np.bincount(g[1:], weights=fall, minlength=n_groups)
    # distinct pressures: 1 + rises up to the top; one per fall after it
    split = eligible & (rise_after_fall == 0) & (n_rise + 1 >= MIN_BRANCH_PRESSURES) \
        & (n_fall >= MIN_BRANCH_PRESSURES)
    if not split.any():
        return column
    after_turn = np.zeros(n, dtype=bool)
    after_turn[1:] = split[g[1:]] & (falls_before > 0)
    values = list(column.values)
    if "desorption" not in values:
        values.append("desorption")
    codes = column.codes.copy()
    codes[order[after_turn]] = values.index("desorption")
    return Text(codes, values)


def duplicate_ids(text: dict[str, Text], gid: IntArray, n_groups: int,
                  ids_per_group: bool) -> BoolArray:
    """Groups whose given isotherm_id an earlier group already used (JSON only:
    CSV rows with one id form one group by construction)."""
    duplicate = np.zeros(n_groups, dtype=bool)
    if not ids_per_group:
        return duplicate
    codes = text["isotherm_id"].codes
    low, _ = group_range(codes.astype(float), codes >= 0, gid, n_groups)
    seen: set[int] = set()
    for g in range(n_groups):
        if np.isfinite(low[g]):
            duplicate[g] = int(low[g]) in seen
            seen.add(int(low[g]))
    return duplicate

