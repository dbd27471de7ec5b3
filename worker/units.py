"""Unit tables and conversions to the canonical units (Pa, mol/kg).

Unit names are matched case-insensitively, ignoring spaces, ``^`` and the
superscript three, so ``"kPa"``, ``"KPA"`` and ``"k pa"`` are one unit, and
``"cm^3(STP)/g"``, ``"cm³ (STP)/g"`` and ``"cm3(stp)/g"`` another.

Pressure units: Pa, kPa, MPa, bar, mbar, atm, torr, mmHg, psi, and relative
pressure p/p0 (dimensionless; converting it needs the saturation pressure).

Loading units, per mass of sorbent: mol/kg, mmol/g, mol/g, mg/g, g/g, wt%,
cm3(STP)/g (= mL(STP)/g). Absolute amounts, which need the sample mass:
cm3(STP), mL(STP), mmol, mol.

Conventions:

* wt% is grams of adsorbate per 100 g of sorbent, i.e. mass of adsorbate per
  mass of (adsorbate-free) sorbent x 100. It is *not* per 100 g of loaded
  sorbent; 10 wt% of CO2 is 0.1 g/g = 2.272 mol/kg.
* STP for gas volumes is 273.15 K and 101.325 kPa, the usual convention of
  volumetric adsorption (common practice, no single source). The molar volume
  is R*T/p with R from scipy.constants (CODATA), never typed by hand.
* mmHg and torr both take scipy.constants' value (atm/760); the
  conventional mmHg differs by 1.4e-7 relative, far below any rig's precision.

Exactness: a conversion by a power of ten (kPa, MPa, bar, mbar to Pa; mmol/g,
mol/g to mol/kg) is correctly rounded: the double nearest to the exact product
of the value read and 10^k, so 3.1 mol/g is 3100 mol/kg and 0.0031 mol/g is
3.1, never 3.1000000000000005; mmol on a sample mass in g is the correctly
rounded quotient. It is one IEEE
operation: a multiplication by 10^k for k >= 0 (10^k is an exact double up to
10^22), a division by 10^-k otherwise (``scaled_by``; 0.001 is no exact double,
so multiplying by it adds an error). An absolute amount is first divided by the
sample mass in g (mmol per g of sample is mol/kg: one division). Every other
conversion (atm, torr, psi, mass, gas volume, p/p0) takes at most two roundings,
a relative error of at most about 2.2e-16.

Units in column names
---------------------
Input columns carry their unit the way output columns do (``temperature_k``,
``pressure_pa``): a quantity, an underscore and a unit token, e.g.
``pressure_kpa`` or ``loading_mmol_per_g``. ``COLUMN_TOKENS`` is the one
table of tokens; ``unit_column`` reads a column name with it and
``column_name`` writes one. A plain ``pressure``/``loading`` column takes its
unit from a ``units`` declaration, ``pressure:kPa,loading:mmol/g`` as text or
``{"pressure": "kPa", "loading": "mmol/g"}`` as a mapping, read by
``parse_units_declaration``.
"""
from __future__ import annotations

import difflib
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy import constants

STP_TEMPERATURE_K = 273.15
STP_PRESSURE_PA = 101325.0
MOLAR_VOLUME_STP_CM3_PER_MOL = constants.R * STP_TEMPERATURE_K / STP_PRESSURE_PA * 1e6

RELATIVE = "p/p0"

# The largest values intake takes as measured, in canonical units. Beyond them a number
# is a typo or an overflow of the unit conversion, never a measurement. Common practice,
# no source: each bound is far outside what adsorption rigs measure (high-pressure rigs
# stop near 100 MPa; 1e4 mol/kg is 10 mol/g, five times hydrogen at 2 g/g; the largest
# BET areas reported are near 7,000-8,000 m2/g, from memory).
MAX_TEMPERATURE_K = 2000.0
MAX_PRESSURE_PA = 1e9
MAX_LOADING_MOL_PER_KG = 1e4
MAX_SURFACE_AREA_M2_PER_G = 1e5


class UnitError(ValueError):
    """A conversion cannot be done; intake turns it into an Issue."""

    def __init__(self, message: str, field: str, code: str):
        super().__init__(message)
        self.field = field
        self.code = code


class UnknownUnit(UnitError):
    """The unit name is not in the table; ``suggestion`` is the nearest one."""

    def __init__(self, name: str, kind: str):
        self.name = name
        self.kind = kind
        self.suggestion = _nearest(name, kind)
        hint = f"; did you mean {self.suggestion!r}?" if self.suggestion else ""
        super().__init__(f"unknown {kind} unit {name!r}{hint}", field=kind, code="unknown_unit")


class MissingReference(UnitError):
    """A unit needs a reference value (p0, sample mass) that was not given."""


# canonical name -> Pa per unit; None marks relative pressure
PRESSURE_PA_PER_UNIT: dict[str, float | None] = {
    "Pa": 1.0,
    "kPa": 1e3,
    "MPa": 1e6,
    "bar": constants.bar,
    "mbar": constants.bar / 1000.0,
    "atm": constants.atm,
    "torr": constants.torr,
    "mmHg": constants.mmHg,
    "psi": constants.psi,
    RELATIVE: None,
}

_PRESSURE_ALIASES = {
    "Pa": ["pa", "pascal"],
    "kPa": ["kpa", "kilopascal"],
    "MPa": ["mpa", "megapascal"],
    "bar": ["bar", "bara"],
    "mbar": ["mbar", "millibar"],
    "atm": ["atm", "atmosphere"],
    "torr": ["torr"],
    "mmHg": ["mmhg", "mm hg"],
    "psi": ["psi", "psia"],
    RELATIVE: ["p/p0", "p/po", "p/ps", "relative", "relative pressure", "relative_pressure"],
}


@dataclass(frozen=True)
class LoadingUnit:
    """How one loading unit converts.

    ``quantity`` is what the number counts: ``amount`` (mol), ``mass`` (g of
    adsorbate) or ``gas_volume`` (cm3 at STP). ``per_kg_sorbent`` tells
    whether it is already specific (per mass of sorbent) or an absolute amount
    that must be divided by the sample mass. ``scale`` turns the number into
    mol (or g, or cm3) per kg of sorbent; for an absolute unit, the number once
    divided by the sample mass in g (mmol per g of sample is mol/kg: scale 1).
    """

    name: str
    quantity: str
    per_kg_sorbent: bool
    scale: float


LOADING_UNIT_TABLE: dict[str, LoadingUnit] = {u.name: u for u in [
    LoadingUnit("mol/kg", "amount", True, 1.0),
    LoadingUnit("mmol/g", "amount", True, 1.0),
    LoadingUnit("mol/g", "amount", True, 1000.0),
    LoadingUnit("mg/g", "mass", True, 1.0),          # mg/g = g/kg
    LoadingUnit("g/g", "mass", True, 1000.0),
    LoadingUnit("wt%", "mass", True, 10.0),          # g per 100 g = 10 g/kg
    LoadingUnit("cm3(STP)/g", "gas_volume", True, 1000.0),
    # absolute amounts: the scale applies per g of sample (cm3/g = 1000 cm3/kg)
    LoadingUnit("cm3(STP)", "gas_volume", False, 1000.0),
    LoadingUnit("mmol", "amount", False, 1.0),
    LoadingUnit("mol", "amount", False, 1000.0),
]}

# the powers of ten a double holds exactly (10^0..10^22) and their reciprocals, by value
_POWER_OF_TEN = {float(f"1e{k}"): k for k in range(-22, 23)}


def scaled_by(values: ArrayLike, factor: float) -> np.ndarray:
    """``values * factor``, correctly rounded where ``factor`` is a power of ten: 10^-k
    (not an exact double) is applied as a division by 10^k (exact), so 3.1 x 0.001
    gives 0.0031, not 0.0031000000000000003."""
    exponent = _POWER_OF_TEN.get(factor)
    if exponent is not None and exponent < 0:
        return np.asarray(values, dtype=float) / float(f"1e{-exponent}")
    return np.asarray(values, dtype=float) * factor

_LOADING_ALIASES = {
    "mol/kg": ["mol/kg", "mol kg-1", "mol.kg-1", "mol_per_kg"],
    "mmol/g": ["mmol/g", "mmol g-1", "mmol.g-1", "mmol_per_g"],
    "mol/g": ["mol/g", "mol_per_g"],
    "mg/g": ["mg/g", "mg_per_g"],
    "g/g": ["g/g", "g_per_g"],
    "wt%": ["wt%", "wt.%", "weight%", "wt_percent", "wtpercent"],
    "cm3(STP)/g": ["cm3(stp)/g", "cm3/g stp", "cm3/g(stp)", "cm3stp/g", "ccstp/g", "cc(stp)/g",
                   "ml(stp)/g", "ml/g stp", "ml/g(stp)", "mlstp/g", "cm3stp_per_g"],
    "cm3(STP)": ["cm3(stp)", "cm3 stp", "cm3stp", "ccstp", "cc(stp)", "ml(stp)", "ml stp", "mlstp"],
    "mmol": ["mmol"],
    "mol": ["mol"],
}


def _key(name: str) -> str:
    """The form unit names are compared in."""
    return "".join(str(name).strip().lower().replace("³", "3").replace("^", "").split())


def _alias_table(aliases: dict[str, list[str]]) -> dict[str, str]:
    table: dict[str, str] = {}
    for canonical, names in aliases.items():
        for n in [canonical, *names]:
            table[_key(n)] = canonical
    return table


_PRESSURE_LOOKUP = _alias_table(_PRESSURE_ALIASES)
_LOADING_LOOKUP = _alias_table(_LOADING_ALIASES)
_LOOKUP = {"pressure": _PRESSURE_LOOKUP, "loading": _LOADING_LOOKUP}

# every accepted spelling (case-insensitive), for documentation and the API
PRESSURE_UNITS: dict[str, tuple[str, ...]] = {c: tuple(a) for c, a in _PRESSURE_ALIASES.items()}
LOADING_UNITS: dict[str, tuple[str, ...]] = {c: tuple(a) for c, a in _LOADING_ALIASES.items()}


def normalise_unit_name(name: str, kind: str) -> str:
    """Return the canonical name of a ``kind`` ("pressure"/"loading") unit.

    Raises UnknownUnit (with the nearest known name) when not recognised.
    """
    canonical = _LOOKUP[kind].get(_key(name))
    if canonical is None:
        raise UnknownUnit(str(name), kind)
    return canonical


def _nearest(name: str, kind: str) -> str | None:
    lookup = _LOOKUP[kind]
    match = difflib.get_close_matches(_key(name), list(lookup), n=1, cutoff=0.6)
    return lookup[match[0]] if match else None


def is_relative(unit: str) -> bool:
    return normalise_unit_name(unit, "pressure") == RELATIVE


def pressure_to_pa(values, unit: str, saturation_pressure_pa=None) -> np.ndarray:
    """Return ``values`` (in ``unit``) as pressures in Pa.

    Relative pressure needs ``saturation_pressure_pa`` (scalar or array
    broadcasting with ``values``); MissingReference otherwise.
    """
    values = np.asarray(values, dtype=float)
    pa_per_unit = PRESSURE_PA_PER_UNIT[normalise_unit_name(unit, "pressure")]
    if pa_per_unit is not None:
        return scaled_by(values, pa_per_unit)
    if saturation_pressure_pa is None:
        raise MissingReference("relative pressure needs the saturation pressure",
                               field="saturation_pressure", code="missing_saturation_pressure")
    return values * np.asarray(saturation_pressure_pa, dtype=float)


def loading_to_mol_per_kg(values, unit: str, molar_mass_g_per_mol,
                          sample_mass_g=None) -> np.ndarray:
    """Return ``values`` (in ``unit``) as loadings in mol per kg of sorbent.

    ``molar_mass_g_per_mol`` (of the adsorbate) is used by mass units;
    ``sample_mass_g`` by absolute units (MissingReference when absent). Both
    may be scalars or arrays broadcasting with ``values``.
    """
    values = np.asarray(values, dtype=float)
    spec = LOADING_UNIT_TABLE[normalise_unit_name(unit, "loading")]
    if not spec.per_kg_sorbent:
        if sample_mass_g is None:
            raise MissingReference(f"loading unit {spec.name!r} is an absolute amount and needs "
                                   "the sample mass", field="sample_mass_g",
                                   code="missing_sample_mass")
        values = values / np.asarray(sample_mass_g, dtype=float)
    scaled = scaled_by(values, spec.scale)
    if spec.quantity == "mass":
        return scaled / np.asarray(molar_mass_g_per_mol, dtype=float)
    if spec.quantity == "gas_volume":
        return scaled / MOLAR_VOLUME_STP_CM3_PER_MOL
    return scaled


# ---------------------------------------------------------------------------
# units in column names and the ``units`` declaration

# Quantities an input column can carry a unit for, longest prefix first so that
# "loading_sigma_mol_per_kg" is a sigma column, not a loading in "sigma_mol_per_kg".
# saturation_pressure and loading_sigma take the units of their kind.
QUANTITY_KIND = {"saturation_pressure": "pressure", "loading_sigma": "loading",
                 "pressure": "pressure", "loading": "loading"}

# column-name token -> canonical unit name, per kind; tokens are lower case
COLUMN_TOKENS: dict[str, dict[str, str]] = {
    "pressure": {
        "pa": "Pa", "kpa": "kPa", "mpa": "MPa", "bar": "bar", "mbar": "mbar", "atm": "atm",
        "torr": "torr", "mmhg": "mmHg", "psi": "psi", "relative": RELATIVE,
    },
    "loading": {
        "mol_per_kg": "mol/kg", "mmol_per_g": "mmol/g", "mol_per_g": "mol/g", "mg_per_g": "mg/g",
        "g_per_g": "g/g", "wt_percent": "wt%", "cm3stp_per_g": "cm3(STP)/g",
        # absolute amounts, divided by sample_mass_g
        "cm3stp": "cm3(STP)", "mmol": "mmol", "mol": "mol",
    },
}
_TOKEN_OF_UNIT = {kind: {unit: token for token, unit in tokens.items()}
                  for kind, tokens in COLUMN_TOKENS.items()}


class UnknownColumnUnit(UnitError):
    """A column name starts like a unit column but its unit token is not in the table."""

    def __init__(self, column: str, quantity: str, token: str, message: str):
        self.column = column
        self.quantity = quantity
        self.token = token
        super().__init__(message, field=column, code="unknown_unit")


def unit_column(name: str) -> tuple[str, str | None] | None:
    """Return (quantity, canonical unit or None for a plain column) of column ``name``,
    or None when it is no unit column.

    Raises UnknownColumnUnit when the name starts with a quantity (``pressure_``)
    but the rest is not a token of COLUMN_TOKENS, or names a relative
    saturation pressure.
    """
    key = str(name).strip().lower()
    for quantity, kind in QUANTITY_KIND.items():
        if key == quantity:
            return quantity, None
        if not key.startswith(quantity + "_"):
            continue
        token = key[len(quantity) + 1:]
        unit = COLUMN_TOKENS[kind].get(token)
        if unit is not None and not (quantity == "saturation_pressure" and unit == RELATIVE):
            return quantity, unit
        tokens = [t for t in COLUMN_TOKENS[kind] if not (quantity == "saturation_pressure"
                                                        and COLUMN_TOKENS[kind][t] == RELATIVE)]
        near = difflib.get_close_matches(token, tokens, n=1, cutoff=0.6)
        hint = f"; did you mean '{quantity}_{near[0]}'?" if near else ""
        raise UnknownColumnUnit(
            str(name).strip(), quantity, token,
            f"column {str(name).strip()!r}: {token!r} is not a {kind} unit token{hint} "
            f"(tokens: {', '.join(tokens)})")
    return None


def column_name(quantity: str, unit: str) -> str:
    """The input column name carrying ``unit``, e.g. ("pressure", "kPa") -> "pressure_kpa"."""
    kind = QUANTITY_KIND[quantity]
    return f"{quantity}_{_TOKEN_OF_UNIT[kind][normalise_unit_name(unit, kind)]}"


def parse_units_declaration(value) -> dict[str, str]:
    """Return {quantity: canonical unit} from a ``units`` declaration.

    ``value`` is text, ``"pressure:kPa,loading:mmol/g"`` (items separated by
    commas or semicolons), or a mapping ``{"pressure": "kPa", ...}``.
    Quantities: pressure, loading, saturation_pressure, loading_sigma. Raises
    ValueError (UnknownUnit for a unit name not in the tables) with a message
    that says what is wrong.
    """
    if isinstance(value, str):
        items = []
        for part in value.replace(";", ",").split(","):
            if not part.strip():
                continue
            quantity, sep, unit = part.partition(":")
            if not sep:
                raise ValueError(f"units item {part.strip()!r} is not quantity:unit "
                                 "(e.g. pressure:kPa,loading:mmol/g)")
            items.append((quantity, unit))
    elif isinstance(value, dict):
        items = list(value.items())
    else:
        raise ValueError(f"units must be text like 'pressure:kPa,loading:mmol/g' or a mapping, "
                         f"not {type(value).__name__}")
    if not items:
        raise ValueError("units declaration is empty (e.g. pressure:kPa,loading:mmol/g)")
    out: dict[str, str] = {}
    for quantity, unit in items:
        key = str(quantity).strip().lower()
        if key not in QUANTITY_KIND:
            near = difflib.get_close_matches(key, list(QUANTITY_KIND), n=1, cutoff=0.6)
            hint = f"; did you mean {near[0]!r}?" if near else ""
            raise ValueError(f"units: unknown quantity {str(quantity).strip()!r}{hint} "
                             f"(quantities: {', '.join(QUANTITY_KIND)})")
        if key in out:
            raise ValueError(f"units: {key!r} is declared twice")
        if not isinstance(unit, str) or not unit.strip():
            raise ValueError(f"units: {key!r} needs a unit name, e.g. {key}:kPa")
        canonical = normalise_unit_name(unit, QUANTITY_KIND[key])
        if key == "saturation_pressure" and canonical == RELATIVE:
            raise ValueError("units: saturation_pressure must be an absolute pressure unit")
        out[key] = canonical
    return out


def format_units_declaration(declared: dict[str, str]) -> str:
    """The text form of a units mapping: {"pressure": "kPa"} -> "pressure:kPa"."""
    return ",".join(f"{quantity}:{unit}" for quantity, unit in declared.items())


def declaration_from_options(units: str | None, pressure_unit: str | None = None,
                             loading_unit: str | None = None) -> dict[str, str] | None:
    """The one units declaration of the command line (--units plus --pressure-unit and
    --loading-unit, which fill it), canonical unit names; None when none was given.
    Raises ValueError, e.g. when a unit is given twice."""
    declared = dict(parse_units_declaration(units)) if units else {}
    for quantity, unit in (("pressure", pressure_unit), ("loading", loading_unit)):
        if unit is None:
            continue
        if quantity in declared:
            raise ValueError(f"the {quantity} unit is given twice: by --units and by "
                             f"--{quantity}-unit")
        declared[quantity] = unit
    return parse_units_declaration(declared) if declared else None
