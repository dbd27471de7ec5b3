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
"""
from __future__ import annotations

import difflib
from dataclasses import dataclass

import numpy as np
from scipy import constants

STP_TEMPERATURE_K = 273.15
STP_PRESSURE_PA = 101325.0
MOLAR_VOLUME_STP_CM3_PER_MOL = constants.R * STP_TEMPERATURE_K / STP_PRESSURE_PA * 1e6

RELATIVE = "p/p0"


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
        super().__init__(f"unknown {kind} unit {name!r}{hint}",
                         field=f"{kind}_unit", code="unknown_unit")


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
    mol (or g, or cm3) per kg of sorbent for specific units, or into mol (or g,
    or cm3) for absolute ones.
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
    LoadingUnit("cm3(STP)", "gas_volume", False, 1.0),
    LoadingUnit("mmol", "amount", False, 1e-3),
    LoadingUnit("mol", "amount", False, 1.0),
]}

_LOADING_ALIASES = {
    "mol/kg": ["mol/kg", "mol kg-1", "mol.kg-1"],
    "mmol/g": ["mmol/g", "mmol g-1", "mmol.g-1"],
    "mol/g": ["mol/g"],
    "mg/g": ["mg/g"],
    "g/g": ["g/g"],
    "wt%": ["wt%", "wt.%", "weight%", "wt_percent", "wtpercent"],
    "cm3(STP)/g": ["cm3(stp)/g", "cm3/g stp", "cm3/g(stp)", "cm3stp/g", "ccstp/g", "cc(stp)/g",
                   "ml(stp)/g", "ml/g stp", "ml/g(stp)", "mlstp/g"],
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


def needs_sample_mass(unit: str) -> bool:
    return not LOADING_UNIT_TABLE[normalise_unit_name(unit, "loading")].per_kg_sorbent


def pressure_to_pa(values, unit: str, saturation_pressure_pa=None) -> np.ndarray:
    """Return ``values`` (in ``unit``) as pressures in Pa.

    Relative pressure needs ``saturation_pressure_pa`` (scalar or array
    broadcasting with ``values``); MissingReference otherwise.
    """
    values = np.asarray(values, dtype=float)
    pa_per_unit = PRESSURE_PA_PER_UNIT[normalise_unit_name(unit, "pressure")]
    if pa_per_unit is not None:
        return values * pa_per_unit
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
    scaled = values * spec.scale
    if not spec.per_kg_sorbent:
        if sample_mass_g is None:
            raise MissingReference(f"loading unit {spec.name!r} is an absolute amount and needs "
                                   "the sample mass", field="sample_mass_g",
                                   code="missing_sample_mass")
        scaled = scaled / (np.asarray(sample_mass_g, dtype=float) / 1000.0)
    if spec.quantity == "mass":
        return scaled / np.asarray(molar_mass_g_per_mol, dtype=float)
    if spec.quantity == "gas_volume":
        return scaled / MOLAR_VOLUME_STP_CM3_PER_MOL
    return scaled
