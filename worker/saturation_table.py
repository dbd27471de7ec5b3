"""Generate the shipped fluid table from CoolProp: ``python -m sorbrank.worker.saturation_table``.

The run path never imports CoolProp (its import alone takes seconds); it reads
two files this module writes into ``worker/data/``:

- ``fluids.json``: for every fluid CoolProp lists, its CoolProp name, aliases,
  CAS number, formula (CoolProp's markup, as given), molar mass, critical and
  triple temperatures, critical pressure, whether it is a pure fluid, and
  where its saturation curve sits in the curve file; plus the CoolProp version.
- ``saturation_curves.f64``: little-endian float64 triples (u, ln p0, d ln p0/du)
  per node, fluid after fluid.

The curve variable is u = sqrt(1 - T/Tc). The vapour pressure's reduced form
ln(p0/pc) is a smooth series in powers of sqrt(1 - T/Tc) (the Wagner-type
forms of vapour-pressure equations), so in u it is smooth right up to the
critical point, where it is awkward in T or 1/T. Each interval between two
nodes is a cubic Hermite piece (values and exact slopes at both ends, the
slope from CoolProp's saturation derivative), so a lookup reads only two
nodes. Intervals are halved until the piece matches CoolProp to
``TOLERANCE_LN_P`` at three interior points; tests/worker/test_adsorbates.py checks
random temperatures against live CoolProp to 1e-6.

Pseudo-pure fluids (CoolProp's "pure" is false: Air, R404A, ...) get no curve:
their bubble and dew pressures differ, so a single p0 would be invented.
"""
from __future__ import annotations

import json
import math
import sys
from array import array
from pathlib import Path

DATA_DIR = Path(__file__).resolve().parent / "data"
FLUIDS_FILE = "fluids.json"
CURVES_FILE = "saturation_curves.f64"
# 1e-7 in ln p0 is a relative error of 1e-7 in p0, ten times inside the 1e-6 the tests demand
TOLERANCE_LN_P = 1e-7
INITIAL_INTERVALS = 8
# CoolProp's saturation solver converges within 1e-8 of Tc (relative) for every fluid
# it lists; the curve stops at the first of these that works
CRITICAL_MARGINS = (1e-8, 1e-7, 1e-6, 1e-5, 1e-4)
FORMAT_VERSION = 1
SLOPE_STEP_U = 1e-5


def hermite_ln_p(u: float, u0: float, f0: float, d0: float, u1: float, f1: float, d1: float) -> float:
    """Cubic Hermite value at u on [u0, u1]; the run path uses the same formula."""
    h = u1 - u0
    s = (u - u0) / h
    s2 = s * s
    s3 = s2 * s
    return ((2 * s3 - 3 * s2 + 1) * f0 + (s3 - 2 * s2 + s) * h * d0
            + (-2 * s3 + 3 * s2) * f1 + (s3 - s2) * h * d1)


class _Curve:
    """ln p0 and its slope in u for one fluid, from CoolProp's HEOS backend."""

    def __init__(self, cp, name: str, t_crit_k: float):
        self._cp = cp
        self._state = cp.AbstractState("HEOS", name)
        self.t_crit_k = t_crit_k

    def temperature_k(self, u: float) -> float:
        return self.t_crit_k * (1.0 - u * u)

    def ln_p(self, u: float) -> float:
        self._state.update(self._cp.QT_INPUTS, 0.0, self.temperature_k(u))
        p = self._state.p()
        if not (math.isfinite(p) and p > 0):
            raise ValueError(f"saturation state not defined at u={u}")
        return math.log(p)

    def value_and_slope(self, u: float) -> tuple[float, float]:
        # The slope is a fourth-order central difference of CoolProp's own
        # ln p0, not its Clausius-Clapeyron derivative: near the triple point
        # of some heavy fluids (PropyleneGlycol, MethylOleate) the two differ
        # by up to a factor of three, and the table must follow the values
        # CoolProp returns. The points may reach a hair past the triple
        # point; the saturation solver still converges there.
        h = SLOPE_STEP_U
        f = self.ln_p
        slope = (8.0 * (f(u + h) - f(u - h)) - (f(u + 2 * h) - f(u - 2 * h))) / (12.0 * h)
        return f(u), slope


def _works(curve: _Curve, u: float) -> bool:
    try:
        curve.value_and_slope(u)
    except Exception:  # noqa: BLE001 - any CoolProp failure means "not usable here"
        return False
    return True


def _build_curve(curve: _Curve, u_low: float, u_high: float) -> tuple[list[tuple[float, float, float]], float]:
    """Nodes (u, ln p, slope) from u_low to u_high and the worst checked error."""
    def node(u):
        f, d = curve.value_and_slope(u)
        return (u, f, d)

    edges = [u_low + (u_high - u_low) * i / INITIAL_INTERVALS for i in range(INITIAL_INTERVALS + 1)]
    edges[-1] = u_high
    pending = [(node(a), node(b)) for a, b in zip(edges[:-1], edges[1:])]
    done: list[tuple[tuple, tuple]] = []
    worst = 0.0
    while pending:
        left, right = pending.pop()
        error = max(abs(hermite_ln_p(left[0] + s * (right[0] - left[0]), *left, *right)
                        - curve.value_and_slope(left[0] + s * (right[0] - left[0]))[0])
                    for s in (0.25, 0.5, 0.75))
        if error > TOLERANCE_LN_P and right[0] - left[0] > 1e-9:
            middle = node(0.5 * (left[0] + right[0]))
            pending += [(left, middle), (middle, right)]
        else:
            worst = max(worst, error)
            done.append((left, right))
    done.sort()
    nodes = [done[0][0]] + [right for _, right in done]
    return nodes, worst


def build() -> tuple[dict, array]:
    import CoolProp
    import CoolProp.CoolProp as cp

    fluids = []
    blob = array("d")
    for name in sorted(cp.get_global_param_string("FluidsList").split(","), key=str.lower):
        def text(key, name=name):
            value = cp.get_fluid_param_string(name, key)
            return None if value in ("", "N/A") else value

        t_crit_k = cp.PropsSI("Tcrit", name)
        t_triple_k = cp.PropsSI("Ttriple", name)
        record = {
            "coolprop_name": name,
            "aliases": [a for a in (text("aliases") or "").split(",") if a],
            "cas": text("CAS"),
            "formula_coolprop": text("formula"),
            "molar_mass_kg_per_mol": cp.PropsSI("M", name),
            "critical_temperature_k": t_crit_k,
            "triple_point_temperature_k": t_triple_k,
            "critical_pressure_pa": cp.PropsSI("pcrit", name),
            "pure": text("pure") == "true",
            "curve": None,
        }
        if record["pure"]:
            curve = _Curve(cp, name, t_crit_k)
            u_high = math.sqrt(1.0 - t_triple_k / t_crit_k)
            if not _works(curve, u_high):
                raise RuntimeError(f"{name}: CoolProp has no saturation state at the triple point")
            u_low = next(math.sqrt(m) for m in CRITICAL_MARGINS if _works(curve, math.sqrt(m)))
            nodes, worst = _build_curve(curve, u_low, u_high)
            record["curve"] = {
                "offset": len(blob) // 3, "nodes": len(nodes),
                "t_min_k": t_triple_k, "t_max_k": curve.temperature_k(u_low),
                "worst_checked_error_ln_p": worst,
            }
            for triple in nodes:
                blob.extend(triple)
        fluids.append(record)
    table = {
        "format_version": FORMAT_VERSION,
        "coolprop_version": CoolProp.__version__,
        "curve_variable": "u = sqrt(1 - T/Tc); cubic Hermite in u of ln(p0/Pa), slopes by central difference",
        "curve_file": CURVES_FILE,
        "tolerance_ln_p": TOLERANCE_LN_P,
        "fluids": fluids,
    }
    return table, blob


def write(directory: Path = DATA_DIR) -> None:
    table, blob = build()
    directory.mkdir(parents=True, exist_ok=True)
    if sys.byteorder == "big":
        blob.byteswap()
    (directory / CURVES_FILE).write_bytes(blob.tobytes())
    (directory / FLUIDS_FILE).write_text(json.dumps(table, indent=0) + "\n",
                                         encoding="utf-8")
    curves = [f["curve"] for f in table["fluids"] if f["curve"]]
    print(f"{len(table['fluids'])} fluids, {len(curves)} curves, "
          f"{sum(c['nodes'] for c in curves)} nodes, CoolProp {table['coolprop_version']}, "
          f"worst checked ln p error {max(c['worst_checked_error_ln_p'] for c in curves):.2e}")


if __name__ == "__main__":
    write()
