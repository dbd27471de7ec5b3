"""Findings and the issue texts: the per-row and per-isotherm problems found while
assembling, and the messages of ``IntakeError`` and ``Issue`` (codes listed in the
package docstring).
"""
from __future__ import annotations

from collections.abc import Iterable
from typing import TYPE_CHECKING, Any, Callable, SupportsInt

import numpy as np

from ..arrays import BoolArray, IntArray
from ..isotherm import IntakeError, Issue
from .rows import MAX_ISSUES_PER_ISOTHERM, OLD_SPELLINGS, Rows

if TYPE_CHECKING:  # assemble imports this module
    from .assemble import GroupNames


def batch_error(label: str, code: str, message: str, fld: str | None = None) -> IntakeError:
    label, fld = printable(label), None if fld is None else printable(fld)
    where = f"batch {label!r}" + (f", field {fld!r}" if fld else "")
    return IntakeError(Issue(label, None, None, fld, code, printable(f"{where}: {message}")))


def short(value: Any, limit: int = 60) -> str:
    text = str(value)
    return text if len(text) <= limit else text[:limit] + "..."


def printable(text: str) -> str:
    """``text`` with every character that is not printable (lone surrogates, controls,
    bidi and zero-width format characters) written as its escape: issue texts go into
    JSON, Parquet and logs, which need valid UTF-8, and must never reorder or hide what
    a reader sees."""
    if text.isprintable():
        return text
    return "".join(ch if ch.isprintable() else ascii(ch)[1:-1] for ch in text)


def echo(value: str, limit: int = 80) -> str:
    """``value`` for a message: its repr, cut to ``limit`` characters with its length."""
    if len(value) <= limit:
        return repr(value)
    return f"{value[:limit]!r}... ({len(value)} characters)"


def nearest(name: str, choices: Iterable[str]) -> str | None:
    import difflib
    match = difflib.get_close_matches(str(name), list(choices), n=1, cutoff=0.6)
    return match[0] if match else None


def old_spelling(name: str, where: str, label: str) -> IntakeError:
    where = where if "'" in where else f"{where} {name!r}"
    return batch_error(label, "old_spelling", f"{where} is no longer read: use "
                        f"{OLD_SPELLINGS[name]}", fld=name)


class Findings:
    """Problems found so far: per row (arrays) and per isotherm."""

    def __init__(self, rows: Rows, gid: IntArray, n_groups: int) -> None:
        self.rows = rows
        self.gid = gid
        self.n_groups = n_groups
        self.row_checks: list[tuple[IntArray, str, str, Callable[[int], str], bool]] = []
        self.group_checks: list[tuple[int, str | None, str, str]] = []

    def rows_where(self, mask: BoolArray, fld: str, code: str, detail: Callable[[int], str],
                   once: bool = False) -> None:
        """Record ``code`` for every row in ``mask`` (only the first per isotherm if ``once``)."""
        index = np.flatnonzero(mask)
        if index.size == 0:
            return
        if once or fld in self.rows.isotherm_level:
            _, first = np.unique(self.gid[index], return_index=True)
            index = index[first]
        self.row_checks.append((index, fld, code, detail, once))

    def groups_where(self, mask: BoolArray, fld: str | None, code: str,
                     detail: Callable[[int], str]) -> None:
        for g in np.flatnonzero(mask):
            self.group_checks.append((int(g), fld, code, detail(int(g))))

    def bad_groups(self) -> BoolArray:
        bad = np.zeros(self.n_groups, dtype=bool)
        for index, *_ in self.row_checks:
            bad[self.gid[index]] = True
        for g, *_ in self.group_checks + self.rows.group_issues:
            bad[g] = True
        return bad


def issue(label: str, isotherm: str, row: SupportsInt | None, fld: str | None, code: str,
          detail: str) -> Issue:
    isotherm, fld = printable(isotherm), None if fld is None else printable(fld)
    where = [f"batch {label!r}", f"isotherm {isotherm!r}"]
    if row is not None:
        where.append(f"row {row}")
    if fld is not None:
        where.append(f"field {fld!r}")
    return Issue(label, isotherm, None if row is None else int(row), fld, code,
                 printable(f"{', '.join(where)}: {detail}"))


def issue_list(found: Findings, names: GroupNames, label: str) -> list[Issue]:
    """All findings as Issues, at most MAX_ISSUES_PER_ISOTHERM per isotherm."""
    per_group: dict[int, list[Issue]] = {}
    total = np.zeros(found.n_groups, dtype=np.int64)

    def add(g: int, fld: str | None, code: str, text: str) -> None:
        total[g] += 1
        bucket = per_group.setdefault(g, [])
        if len(bucket) < MAX_ISSUES_PER_ISOTHERM:
            bucket.append(issue(label, names[g], None, found.rows.field_name(fld, g), code, text))

    for g, fld, code, text in found.rows.group_issues:
        add(g, fld, code, text)
    for g, fld, code, text in found.group_checks:
        add(g, fld, code, text)
    for index, fld, code, detail, once in found.row_checks:
        per_isotherm = fld in found.rows.isotherm_level
        # keep only rows that still fit under the cap, without a loop over all of them
        g_rows = found.gid[index]
        counts_before = total.copy()
        order = np.argsort(g_rows, kind="stable")
        rank = np.empty(index.size, dtype=np.int64)
        starts = np.searchsorted(g_rows[order], g_rows[order])
        rank[order] = np.arange(index.size) - starts
        keep = counts_before[g_rows] + rank < MAX_ISSUES_PER_ISOTHERM
        np.add.at(total, g_rows, 1)
        for i in index[keep]:
            g = int(found.gid[i])
            row = None if per_isotherm else found.rows.row_label[i]
            per_group.setdefault(g, []).append(
                issue(label, names[g], row, found.rows.field_name(fld, g), code, detail(int(i))))
    out: list[Issue] = []
    for g in sorted(per_group):
        bucket = sorted(per_group[g], key=lambda s: (s.row is not None, s.row or 0))
        out.extend(bucket)
        if total[g] > len(bucket):
            out.append(issue(label, names[g], None, None, "more_issues",
                              f"{total[g] - len(bucket)} more issue(s) not listed"))
    return out

