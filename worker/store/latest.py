"""Latest wins: of the rows that measured the same sorbent, adsorbate,
temperature (nearest 1 K) and branch, the one accepted last. Two ways that
give the same rows: integer codes (fast, most tables) and a sort (the rest);
``tests/worker/test_store.py`` checks they agree."""
from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..arrays import IntArray


def latest_rows(table: pa.Table) -> IntArray | None:
    """Latest wins: row indices of one row per sorbent, adsorbate,
    temperature (nearest 1 K) and branch -- the one accepted last, then of
    the larger batch id, then of the smaller isotherm id; nulls lose.

    Found on integer codes; None where
    this path does not apply (NaN temperatures, a key space too large for one
    int64), and ``latest_wins_by_sorting`` decides instead.

    Sorting a million rows by timestamp, batch id and isotherm id (strings)
    took most of an unfiltered ranking; here the strings are ranked once per
    distinct value, the rows are ordered on integers, and isotherm ids are
    compared only between rows that tie on everything else."""
    keys = ["sorbent_id", "adsorbate", "temperature_k"]
    if "branch" in table.column_names:
        keys.append("branch")
    group = np.zeros(table.num_rows, dtype=np.int64)
    span = 1
    for name in keys:
        column = table[name].combine_chunks()
        if name == "temperature_k":
            column = pc.round(column, 0)
            if pc.any(pc.is_nan(column)).as_py():
                return None
        codes, size = integer_codes(column)
        span *= size + 1
        if span >= 2 ** 62:
            return None
        group = group * (size + 1) + codes
    accepted = table["accepted_at"].combine_chunks()
    # newest first, nulls last: order on the negated values, a null as the largest
    if pa.types.is_timestamp(accepted.type) or pa.types.is_integer(accepted.type):
        values = pc.cast(accepted, pa.int64()).fill_null(np.iinfo(np.int64).min + 1)
        newest = -values.to_numpy(zero_copy_only=False)
    else:
        codes, size = integer_codes(accepted, ranked=True)
        newest = np.where(codes < size, -codes, 1)
    batch_codes, n_batches = integer_codes(table["batch_id"].combine_chunks(), ranked=True)
    later_batch = np.where(batch_codes < n_batches, -batch_codes, 1)   # larger id first, null last
    order = np.lexsort((later_batch, newest, group))
    g, a, b = group[order], newest[order], later_batch[order]
    first = np.ones(order.size, dtype=bool)
    first[1:] = g[1:] != g[:-1]
    same = np.zeros(order.size, dtype=bool)
    same[1:] = ~first[1:] & (a[1:] == a[:-1]) & (b[1:] == b[:-1])
    run = np.cumsum(~same)                     # runs of rows equal on all but the isotherm id
    top = run == run[np.flatnonzero(first)][np.cumsum(first) - 1]
    tied_group = np.zeros(order.size, dtype=bool)
    tied_group[top & ~first] = True
    if not tied_group.any():
        return order[first]
    # groups whose newest batch holds several of its rows: the smaller isotherm id
    # wins (nulls last, then the earlier row: lexsort and sort_by are stable)
    group_no = np.cumsum(first) - 1
    has_tie = np.zeros(int(group_no[-1]) + 1, dtype=bool)
    has_tie[group_no[tied_group]] = True
    in_tie = top & has_tie[group_no]
    rows = order[in_tie]
    small = pa.table({"g": pa.array(group_no[in_tie]),
                      "iso": table["isotherm_id"].take(pa.array(rows)),
                      "row": pa.array(rows)})
    small = small.sort_by([("g", "ascending"), ("iso", "ascending")])
    sg = small["g"].to_numpy()
    lead = np.ones(sg.size, dtype=bool)
    lead[1:] = sg[1:] != sg[:-1]
    return np.concatenate([order[first & ~has_tie[group_no]], small["row"].to_numpy()[lead]])


def integer_codes(column: pa.Array, ranked: bool = False) -> tuple[IntArray, int]:
    """Integer code per row (a null gets the largest, ``size``) and the number
    of distinct non-null values; ``ranked``: codes follow the values' order."""
    encoded = pc.dictionary_encode(column)
    size = len(encoded.dictionary)
    codes = encoded.indices.fill_null(size).to_numpy(zero_copy_only=False).astype(np.int64)
    if ranked and size:
        rank = np.empty(size, dtype=np.int64)
        rank[pc.sort_indices(encoded.dictionary).to_numpy()] = np.arange(size)
        codes = np.where(codes < size, rank[np.minimum(codes, size - 1)], size)
    return codes, size


def latest_wins_by_sorting(table: pa.Table) -> pa.Table:
    newest_first = table.sort_by([("accepted_at", "descending"), ("batch_id", "descending"),
                                  ("isotherm_id", "ascending")])
    keys = ["sorbent_id", "adsorbate", "_temperature_key"]
    if "branch" in newest_first.column_names:
        keys.append("branch")
    keyed = newest_first.append_column(
        "_temperature_key", pc.round(newest_first["temperature_k"], 0)
    ).append_column("_order", pa.array(range(newest_first.num_rows), pa.int64()))
    first = keyed.group_by(keys, use_threads=False).aggregate([("_order", "min")])
    return newest_first.take(first["_order_min"])
