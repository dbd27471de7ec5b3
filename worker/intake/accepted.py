"""Building the accepted isotherms: points sorted by pressure, the non-monotonic
flag, and one ``Isotherm`` per good group with its original values.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..adsorbates import Adsorbate
from ..arrays import BoolArray, FloatArray, IntArray
from ..isotherm import Isotherm
from .rows import (
    BRANCHES,
    NON_MONOTONIC_FRACTION,
    NON_MONOTONIC_SIGMAS,
    OK,
    QUANTITIES,
    UNIT_FIELD,
    Numbers,
    Rows,
    Text,
)


@dataclass
class Points:
    """All points sorted by (isotherm, pressure); replicates kept, in input order."""

    group: IntArray            # isotherm index per point
    pressure_pa: FloatArray
    loading_mol_per_kg: FloatArray
    sigma_mol_per_kg: FloatArray
    start: IntArray            # isotherm g owns points start[g]:start[g + 1]
    n_distinct: IntArray       # distinct pressures per isotherm
    block_start: IntArray      # per point: index of the first point at its pressure


def sorted_points(gid: IntArray, n_groups: int, pressure_pa: FloatArray, loading: FloatArray,
                  sigma: FloatArray) -> Points:
    """Return every point sorted per isotherm by pressure, replicates kept (module
    docstring)."""
    order = np.lexsort((pressure_pa, gid))
    g, p = gid[order], pressure_pa[order]
    new_pressure = np.ones(g.size, dtype=bool)
    new_pressure[1:] = (g[1:] != g[:-1]) | (p[1:] != p[:-1])
    block_start = np.maximum.accumulate(np.where(new_pressure, np.arange(g.size), 0)) \
        if g.size else np.zeros(0, dtype=np.int64)
    n_distinct = np.bincount(g[new_pressure], minlength=n_groups)
    counts = np.bincount(g, minlength=n_groups)
    return Points(g, p, loading[order], sigma[order], np.concatenate([[0], np.cumsum(counts)]),
                   n_distinct, block_start)


def non_monotonic_groups(points: Points, n_groups: int) -> BoolArray:
    """Per isotherm: does a point fall below the best loading at lower pressure by more
    than max(2 % of the isotherm's top loading, 3 sigma)?"""
    q = points.loading_mol_per_kg
    top = np.zeros(n_groups)
    np.maximum.at(top, points.group, np.where(np.isfinite(q), q, 0.0))
    scale = np.where(top > 0, top, 1.0)[points.group]
    with np.errstate(all="ignore"):
        q_norm = np.clip(np.nan_to_num(q / scale), 0.0, 1.0)
        allowance = np.maximum(NON_MONOTONIC_FRACTION,
                               NON_MONOTONIC_SIGMAS * np.nan_to_num(points.sigma_mol_per_kg / scale))
    # one running maximum over all isotherms at once: isotherm g is lifted by 2g, so an
    # earlier isotherm's maximum (at most 2g - 1) never reaches into the next one
    lift = 2.0 * points.group
    best_so_far = np.maximum.accumulate(q_norm + lift) - lift
    # compared with the points at strictly lower pressure: replicates are not a fall
    before = points.block_start - 1
    has_lower = (before >= 0) & (points.group[np.maximum(before, 0)] == points.group)
    falls = has_lower & (best_so_far[np.maximum(before, 0)] - q_norm > allowance)
    return np.bincount(points.group[falls], minlength=n_groups) > 0


@dataclass
class Accepted:
    """Everything needed to build the accepted isotherms, one cheap call each."""

    rows: Rows
    text: dict[str, Text]
    number: dict[str, Numbers]
    label: str
    points: Points
    input_order: IntArray      # rows grouped by isotherm, input order inside
    input_start: IntArray
    has_sigma: BoolArray
    adsorbate: list[Adsorbate | None]   # per isotherm; None: no known adsorbate (rejected)
    group_value: dict[str, FloatArray]
    p0_pa: FloatArray
    relative_input: BoolArray
    non_monotonic: BoolArray

    def isotherm(self, g: int) -> Isotherm:
        pts = self.points
        span = slice(pts.start[g], pts.start[g + 1])
        p = pts.pressure_pa[span].copy()
        q = pts.loading_mol_per_kg[span].copy()
        sigma = pts.sigma_mol_per_kg[span].copy() if self.has_sigma[g] else None
        p0 = None if np.isnan(self.p0_pa[g]) else float(self.p0_pa[g])
        flags = [name for name, on in (
            ("non_monotonic_loading", self.non_monotonic[g]),
            ("pressure_above_saturation",
             p0 is not None and not self.relative_input[g] and p[-1] > p0)) if on]
        value = self.group_value
        sorbent_id = self.text["sorbent_id"].values[int(value["sorbent_id"][g])]
        adsorbate = self.adsorbate[g]
        if adsorbate is None:  # an isotherm without a known adsorbate is rejected before this
            raise ValueError(f"isotherm {g} has no known adsorbate")
        temperature_k = float(value["temperature_k"][g])
        branch = BRANCHES[int(value["branch"][g])]
        in_input = self.input_order[self.input_start[g]:self.input_start[g + 1]]
        given_id = self.text["isotherm_id"].codes[in_input[0]]
        if given_id >= 0:
            isotherm_id = self.text["isotherm_id"].values[given_id]
        else:
            content = f"{sorbent_id}|{adsorbate.id}|{temperature_k!r}|{branch}".encode()
            digest = hashlib.sha256(content + p.tobytes() + q.tobytes()).hexdigest()[:10]
            isotherm_id = f"{sorbent_id}|{adsorbate.id}|{temperature_k:.2f}K|{branch}|{digest}"
        area = value["surface_area_m2_per_g"][g]
        return Isotherm(
            isotherm_id=isotherm_id, sorbent_id=sorbent_id, adsorbate=adsorbate.id,
            temperature_k=temperature_k, pressure_pa=p, loading_mol_per_kg=q, branch=branch,
            saturation_pressure_pa=p0, sigma_mol_per_kg=sigma,
            surface_area_m2_per_g=None if np.isnan(area) else float(area),
            batch_label=self.label, flags=flags, original=self._original(g, in_input),
        )

    def _original(self, g: int, in_input: IntArray) -> dict[str, Any]:
        """The values as sent, with their units and source rows, in input order."""
        first = in_input[0]

        def as_sent(name: str) -> str | None:
            column = self.text[name]
            code = column.codes[first]
            return column.values[code] if code >= 0 else None

        def scalar(name: str) -> float | None:
            column = self.number[name]
            return float(column.value[first]) if column.problem[first] == OK else None

        number = self.number
        given = {"pressure": True, "loading": True, "loading_sigma": bool(self.has_sigma[g]),
                 "saturation_pressure": number["saturation_pressure"].problem[first] == OK}
        sent_units = {q: as_sent(UNIT_FIELD[q]) for q in QUANTITIES if given[q]}
        # plain saturation_pressure / loading_sigma columns take the pressure / loading unit
        for quantity, kind in (("saturation_pressure", "pressure"), ("loading_sigma", "loading")):
            if quantity in sent_units and sent_units[quantity] is None:
                sent_units[quantity] = sent_units[kind]
        return {
            "source": self.rows.source,
            "rows": self.rows.row_label[in_input],
            "adsorbate": as_sent("adsorbate"),
            "temperature_k": scalar("temperature_k"),
            "pressure": number["pressure"].value[in_input],
            "loading": number["loading"].value[in_input],
            "loading_sigma": number["loading_sigma"].value[in_input] if self.has_sigma[g] else None,
            "units": {q: u for q, u in sent_units.items() if u is not None},
            "saturation_pressure": scalar("saturation_pressure"),
            "sample_mass_g": scalar("sample_mass_g"),
        }

