"""Vapour pressures from the shipped saturation curves, and the supercooled-liquid p0.

``worker/saturation_table.py`` writes the curves (from CoolProp, offline);
this module reads them on the run path, without CoolProp. It knows curves and
temperatures, not names: ``worker/adsorbates.py`` turns a gas name into its
curve and critical and triple temperatures, then calls here, and keeps the
public functions (``saturation_pressure_pa``, ``relative_pressure_p0_pa``, ...).

A curve is the ``curve`` record of a fluid in ``fluids.json``: the temperature
range it covers (``t_min_k`` to ``t_max_k``, the triple point to just below
the critical point), and where its nodes sit in the curve file (``offset``,
``nodes``).
"""
from __future__ import annotations

import bisect
import functools
import math
import sys
from array import array
from collections.abc import Callable, Mapping
from typing import Any

from .saturation_table import CURVES_FILE, DATA_DIR, hermite_ln_p

# Kr and Ar are measured at 77 K below their triple points (115.8 K, 83.8 K),
# where there is no liquid p0; the trade refers relative pressures to the
# vapour pressure of the supercooled liquid (IUPAC 2015 report, Thommes et al.,
# Pure Appl. Chem. 87 (2015) 1051, from memory).
SUPERCOOLED_LIQUID_GASES = ("Kr", "Ar")
# the lowest temperature of the BET window of these gases (77.35 K - 3 K) and a margin
SUPERCOOLED_LOWEST_TEMPERATURE_K = 74.0
# ln p0 against 1/T is taken as straight (Clausius-Clapeyron, constant heat of
# vaporisation) through the liquid curve at the triple point and this far above it
SUPERCOOLED_SLOPE_SPAN_K = 5.0
# The conventional p0 of supercooled liquid krypton at 77.35 K, 0.350 kPa
# (2.63 Torr; from memory, /work/shared/REFERENCES.md). The straight
# extrapolation gives 0.60 kPa there: the convention is not that extrapolation,
# so krypton is anchored to it and only its temperature dependence comes from
# the curve.
SUPERCOOLED_ANCHOR_PA = {"Kr": (77.35, 350.0)}
SUPERCOOLED_ANCHOR_SOURCE = "0.350 kPa (2.63 Torr) at 77.35 K, the conventional value (from memory)"


@functools.cache
def _curves() -> array:
    values = array("d")
    values.frombytes((DATA_DIR / CURVES_FILE).read_bytes())
    if sys.byteorder == "big":
        values.byteswap()
    return values


@functools.cache
def _u_nodes(start: int, n: int) -> array:
    return _curves()[3 * start:3 * (start + n):3]


def curve_saturation_pressure_pa(curve: Mapping[str, Any], t_crit_k: float,
                                 temperature_k: float) -> float | None:
    """p0 in Pa on ``curve`` at ``temperature_k``; None outside the curve's range."""
    if not (curve["t_min_k"] <= temperature_k <= curve["t_max_k"]):
        return None
    start, n = curve["offset"], curve["nodes"]
    u_nodes = _u_nodes(start, n)
    # the triple point itself may round a hair past the last node
    u = min(max(math.sqrt(max(0.0, 1.0 - temperature_k / t_crit_k)), u_nodes[0]), u_nodes[-1])
    i = min(max(bisect.bisect_right(u_nodes, u) - 1, 0), n - 2)
    ln_p = hermite_ln_p(u, *_curves()[3 * (start + i):3 * (start + i + 2)])
    return math.exp(ln_p)


def _liquid_curve_clausius_clapeyron(liquid_p0_pa: Callable[[float], float | None],
                                     t_triple_k: float) -> tuple[float, float] | None:
    """(ln p0 at the triple point, B = heat of vaporisation / R in K) of the liquid curve."""
    p_triple = liquid_p0_pa(t_triple_k)
    p_above = liquid_p0_pa(t_triple_k + SUPERCOOLED_SLOPE_SPAN_K)
    if p_triple is None or p_above is None:
        return None
    slope_k = math.log(p_above / p_triple) / (1.0 / t_triple_k - 1.0 / (t_triple_k + SUPERCOOLED_SLOPE_SPAN_K))
    return math.log(p_triple), slope_k


def supercooled_liquid_p0_pa(gas_id: str, t_triple_k: float | None,
                             liquid_p0_pa: Callable[[float], float | None],
                             temperature_k: float) -> float | None:
    """p0 in Pa of the supercooled liquid of ``gas_id`` (Kr or Ar) below its triple point.

    ln p0 = ln p0(T_ref) - B (1/T - 1/T_ref), B from the liquid curve
    (``liquid_p0_pa``, the saturation pressure at a temperature) between the
    triple point and SUPERCOOLED_SLOPE_SPAN_K above it; T_ref is the triple
    point, or for krypton the conventional value's temperature
    (SUPERCOOLED_ANCHOR_PA). None for other gases, without a triple point, at
    or above it and below SUPERCOOLED_LOWEST_TEMPERATURE_K.
    """
    if (gas_id not in SUPERCOOLED_LIQUID_GASES or t_triple_k is None
            or not (SUPERCOOLED_LOWEST_TEMPERATURE_K <= temperature_k < t_triple_k)):
        return None
    curve = _liquid_curve_clausius_clapeyron(liquid_p0_pa, t_triple_k)
    if curve is None:
        return None
    ln_p_ref, slope_k = curve
    t_ref = t_triple_k
    if gas_id in SUPERCOOLED_ANCHOR_PA:
        t_ref, p_ref = SUPERCOOLED_ANCHOR_PA[gas_id]
        ln_p_ref = math.log(p_ref)
    return math.exp(ln_p_ref - slope_k * (1.0 / temperature_k - 1.0 / t_ref))
