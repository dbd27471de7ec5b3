"""Process conditions and mixture requests (JSON top-level keys, and the Python
API's keywords), read by the JSON batch format's rules.
"""
from __future__ import annotations

import json
import math
from typing import Any

from .. import units
from ..adsorbates import Adsorbate
from ..csvcodec import formula_problem
from ..isotherm import Conditions, MixtureRequest
from .checks import lookup_adsorbate, unknown_adsorbate
from .issues import batch_error, echo, nearest, short
from .json import json_number
from .rows import OK
from .source import id_problem

CONDITION_PRESSURES = ("adsorption_pressure", "desorption_pressure", "reference_pressures")


# each reference pressure becomes columns of every later ranking row (the shared summaries)
MAX_REFERENCE_PRESSURES = 32


CONDITION_TEMPERATURES = ("adsorption_temperature_k", "desorption_temperature_k")


def pressure_keys(raw: object, bases: tuple[str, ...], others: tuple[str, ...],
                  settings: dict[str, Any], where: str, label: str, code: str) -> dict[str, tuple[Any, float]]:
    """{base: (value, Pa per unit)} for keys ``base`` (in the declared pressure unit) or
    ``base_<token>``; any other key outside ``others`` is an error."""
    if not isinstance(raw, dict):
        raise batch_error(label, code, "must be an object", fld=where)
    out: dict[str, tuple[Any, float]] = {}
    for key, value in raw.items():
        name = str(key).strip().lower()
        if name in others:
            continue
        if name == "pressure_unit":
            raise batch_error(label, "old_spelling", f"{where}: 'pressure_unit' is no longer read: "
                               f"name the unit in each key (e.g. {bases[0]}_kpa) or declare the "
                               "top-level units", fld=f"{where}.pressure_unit")
        base = next((b for b in bases if name == b or name.startswith(b + "_")), None)
        if base is None:
            near = nearest(name, [f"{b}_kpa" for b in bases] + list(others))
            raise batch_error(label, code, f"unknown key {short(key)!r}"
                               + (f"; did you mean {near!r}?" if near else ""), fld=where)
        if base in out:
            raise batch_error(label, code, f"two keys give {base}; keep one", fld=f"{where}.{key}")
        if name == base:
            unit = settings.get("units", {}).get("pressure")
            if unit is None:
                raise batch_error(label, code, f"{base!r} has no unit: name it in the key "
                                   f"(e.g. {base}_kpa) or declare the top-level units",
                                   fld=f"{where}.{key}")
        else:
            token = name[len(base) + 1:]
            unit = units.COLUMN_TOKENS["pressure"].get(token)
            if unit is None:
                raise batch_error(label, code, f"{token!r} is not a pressure unit token (tokens: "
                                   f"{', '.join(units.COLUMN_TOKENS['pressure'])})",
                                   fld=f"{where}.{key}")
        factor = units.PRESSURE_PA_PER_UNIT[unit]
        if factor is None:
            raise batch_error(label, code, "must be an absolute pressure, not relative",
                               fld=f"{where}.{key}")
        out[base] = (value, factor)
    return out


def read_conditions(raw: Any, settings: dict[str, Any], label: str) -> Conditions:
    if raw is None:
        return Conditions()
    where = "conditions"
    pressures = pressure_keys(raw, CONDITION_PRESSURES, CONDITION_TEMPERATURES, settings, where,
                               label, "invalid_conditions")
    out: dict[str, float | tuple[float, ...]] = {}
    for key, minimum in (("adsorption_pressure", "positive"), ("desorption_pressure", "non_negative")):
        if key in pressures:
            value, pa_per_unit = pressures[key]
            out[key + "_pa"] = checked_pressure_pa(value, pa_per_unit, minimum, f"{where}.{key}",
                                                    label, "invalid_conditions")
    if "reference_pressures" in pressures:
        values, pa_per_unit = pressures["reference_pressures"]
        if not isinstance(values, list) or not values:
            raise batch_error(label, "invalid_conditions", "must be a non-empty list of numbers",
                               fld=f"{where}.reference_pressures")
        if len(values) > MAX_REFERENCE_PRESSURES:
            raise batch_error(label, "invalid_conditions", f"{len(values)} values, at most "
                               f"{MAX_REFERENCE_PRESSURES} (each becomes result columns)",
                               fld=f"{where}.reference_pressures")
        out["reference_pressures_pa"] = tuple(
            checked_pressure_pa(v, pa_per_unit, "non_negative", f"{where}.reference_pressures[{i}]",
                                 label, "invalid_conditions") for i, v in enumerate(values))
    for key in CONDITION_TEMPERATURES:
        if raw.get(key) is not None:
            out[key] = checked_temperature_k(raw[key], f"{where}.{key}", label, "invalid_conditions")
    conditions = Conditions(**{**Conditions().__dict__, **out})
    if conditions.desorption_pressure_pa > conditions.adsorption_pressure_pa:
        raise batch_error(label, "invalid_conditions",
                           "desorption pressure must not be above the adsorption pressure",
                           fld=f"{where}.desorption_pressure")
    return conditions


def read_mixtures(raw: Any, settings: dict[str, Any], declared: list[Adsorbate],
                  label: str) -> list[MixtureRequest]:
    if raw is None:
        return []
    if not isinstance(raw, list):
        raise batch_error(label, "invalid_mixture", "must be a list", fld="mixtures")
    fields = ("sorbent_id", "components", "mole_fractions", "temperature_k")
    out = []
    for i, item in enumerate(raw):
        where = f"mixtures[{i}]"
        pressures = pressure_keys(item, ("total_pressure",), fields, settings, where, label,
                                   "invalid_mixture")
        sorbent_id = item.get("sorbent_id")
        if sorbent_id is not None:
            problem = id_problem(sorbent_id) if isinstance(sorbent_id, str) else "is not text"
            if problem:
                raise batch_error(label, "invalid_mixture", f"sorbent_id {echo(str(sorbent_id))} "
                                   f"{problem} (give a valid id, or null for every sorbent)",
                                   fld=f"{where}.sorbent_id")
            problem = formula_problem(sorbent_id)
            if problem:  # intake refuses such sorbent ids, so none could match
                raise batch_error(label, "formula_start", f"sorbent_id {echo(sorbent_id)} "
                                   f"{problem}", fld=f"{where}.sorbent_id")
        components = item.get("components")
        fractions = item.get("mole_fractions")
        if not isinstance(components, list) or len(components) < 2:
            raise batch_error(label, "invalid_mixture", "needs a list of at least 2 components",
                               fld=f"{where}.components")
        ids = []
        for c in components:
            found = lookup_adsorbate(c, declared) if isinstance(c, str) else None
            if found is None:
                raise batch_error(label, "invalid_mixture", unknown_adsorbate(str(c)),
                                   fld=f"{where}.components")
            ids.append(found.id)
        if len(set(ids)) != len(ids):
            raise batch_error(label, "invalid_mixture", "a component is listed twice",
                               fld=f"{where}.components")
        if not isinstance(fractions, list) or len(fractions) != len(ids):
            raise batch_error(label, "invalid_mixture", "needs one mole fraction per component",
                               fld=f"{where}.mole_fractions")
        y = [checked_number(v, "positive", f"{where}.mole_fractions[{k}]", label, "invalid_mixture")
             for k, v in enumerate(fractions)]
        if abs(sum(y) - 1.0) > 1e-6:
            raise batch_error(label, "invalid_mixture", f"mole fractions sum to {sum(y):.9g}, not 1",
                               fld=f"{where}.mole_fractions")
        if "total_pressure" not in pressures:
            raise batch_error(label, "invalid_mixture", "needs a total pressure (e.g. "
                               "total_pressure_bar)", fld=f"{where}.total_pressure")
        value, pa_per_unit = pressures["total_pressure"]
        out.append(MixtureRequest(
            sorbent_id=sorbent_id, components=ids, mole_fractions=y,
            total_pressure_pa=checked_pressure_pa(value, pa_per_unit, "positive",
                                                   f"{where}.total_pressure", label, "invalid_mixture"),
            temperature_k=checked_temperature_k(item.get("temperature_k"), f"{where}.temperature_k",
                                                 label, "invalid_mixture")))
    return out


def checked_number(value: Any, minimum: str, fld: str, label: str, code: str) -> float:
    number, problem = json_number(value)
    if problem != OK:
        raise batch_error(label, code, f"{short(json.dumps(value))} is not a finite number", fld=fld)
    if number < 0 or (minimum == "positive" and number == 0):
        raise batch_error(label, code, f"{number:g} must be "
                           + ("greater than zero" if minimum == "positive" else "zero or more"), fld=fld)
    return number


def checked_pressure_pa(value: Any, pa_per_unit: float, minimum: str, fld: str, label: str,
                         code: str) -> float:
    """``value`` (in the unit of ``pa_per_unit``) in Pa, checked against the physical bound."""
    number = checked_number(value, minimum, fld, label, code)
    pressure_pa = number * pa_per_unit
    if not pressure_pa <= units.MAX_PRESSURE_PA:  # inf after an overflow fails too
        became = "overflows when converted to Pa" if math.isinf(pressure_pa) else \
            f"is {pressure_pa:.3g} Pa"
        raise batch_error(label, code, f"{number:g} {became}, above the limit "
                           f"{units.MAX_PRESSURE_PA:g} Pa", fld=fld)
    return pressure_pa


def checked_temperature_k(value: Any, fld: str, label: str, code: str) -> float:
    temperature_k = checked_number(value, "positive", fld, label, code)
    if temperature_k > units.MAX_TEMPERATURE_K:
        raise batch_error(label, code, f"{temperature_k:g} K is above the limit "
                           f"{units.MAX_TEMPERATURE_K:g} K", fld=fld)
    return temperature_k

