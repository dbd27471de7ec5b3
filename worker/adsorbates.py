"""The adsorbate property table: names, molar mass, BET cross-section, p0.

Each Adsorbate carries a ``sources`` dict naming where every value comes
from. Molar masses are computed from the CIAAW standard atomic weights below
(typed from memory; tests compare them with CoolProp's molar masses).
Critical temperatures are typed from memory and checked against CoolProp in
the tests: CoolProp takes about two seconds to import, too slow for every
worker start, so it is imported only when a saturation pressure is asked for.
"""
from __future__ import annotations

import difflib
import functools
import math
from dataclasses import dataclass, field

# CIAAW standard atomic weights, conventional values (from memory)
_ATOMIC_WEIGHT_G_PER_MOL = {
    "H": 1.008, "C": 12.011, "N": 14.007, "O": 15.999,
    "Ar": 39.948, "Kr": 83.798, "Xe": 131.293,
}
_MOLAR_MASS_SOURCE = "sum of CIAAW standard atomic weights (from memory)"
_TC_SOURCE = "(from memory); checked against CoolProp in tests"
_IUPAC_2015 = ("IUPAC 2015 physisorption report, Thommes et al., "
               "Pure Appl. Chem. 87 (2015) 1051")


@dataclass(frozen=True)
class Adsorbate:
    id: str                                  # canonical formula, e.g. "CO2"
    names: tuple[str, ...]                   # aliases, matched case-insensitively
    molar_mass_g_per_mol: float
    cross_section_nm2: float | None          # BET molecular cross-section
    coolprop_name: str
    critical_temperature_k: float
    sources: dict[str, str] = field(default_factory=dict, compare=False)


def _molar_mass_g_per_mol(composition: dict[str, int]) -> float:
    return sum(_ATOMIC_WEIGHT_G_PER_MOL[el] * n for el, n in composition.items())


def _make(id_: str, names, composition, coolprop_name, tc_k, cross_section_nm2=None,
          cross_section_source=None) -> Adsorbate:
    sources = {
        "molar_mass_g_per_mol": _MOLAR_MASS_SOURCE,
        "critical_temperature_k": _TC_SOURCE,
        "saturation_pressure_pa": "CoolProp PropsSI('P','T',T,'Q',0,fluid)",
        "cross_section_nm2": cross_section_source or "not tabulated (no solid source)",
    }
    return Adsorbate(id_, tuple(names), _molar_mass_g_per_mol(composition),
                     cross_section_nm2, coolprop_name, tc_k, sources)


ADSORBATES: dict[str, Adsorbate] = {a.id: a for a in [
    _make("N2", ["nitrogen"], {"N": 2}, "Nitrogen", 126.192,
          0.162, f"{_IUPAC_2015} (N2 at 77 K)"),
    _make("Ar", ["argon"], {"Ar": 1}, "Argon", 150.687,
          0.142, f"{_IUPAC_2015} (Ar at 87 K) (from memory)"),
    _make("Kr", ["krypton"], {"Kr": 1}, "Krypton", 209.48,
          0.202, f"{_IUPAC_2015} (Kr at 77 K) (from memory)"),
    _make("CO2", ["carbon dioxide"], {"C": 1, "O": 2}, "CarbonDioxide", 304.128),
    _make("CH4", ["methane"], {"C": 1, "H": 4}, "Methane", 190.564),
    _make("H2", ["hydrogen"], {"H": 2}, "Hydrogen", 33.145),
    _make("H2O", ["water", "water vapour", "water vapor"], {"H": 2, "O": 1}, "Water", 647.096),
    _make("CO", ["carbon monoxide"], {"C": 1, "O": 1}, "CarbonMonoxide", 132.86),
    _make("O2", ["oxygen"], {"O": 2}, "Oxygen", 154.581),
    _make("C2H6", ["ethane"], {"C": 2, "H": 6}, "Ethane", 305.322),
    _make("C3H8", ["propane", "n-propane"], {"C": 3, "H": 8}, "n-Propane", 369.89),
    _make("Xe", ["xenon"], {"Xe": 1}, "Xenon", 289.733),
]}


def _key(name: str) -> str:
    """Compare names without case, spaces, hyphens or underscores."""
    return "".join(ch for ch in str(name).lower() if ch not in " \t-_")


def _build_index() -> tuple[dict[str, Adsorbate], dict[str, str]]:
    by_key: dict[str, Adsorbate] = {}
    display: dict[str, str] = {}
    for ads in ADSORBATES.values():
        for name in (ads.id, *ads.names, ads.coolprop_name):
            by_key[_key(name)] = ads
            display.setdefault(_key(name), name)
    return by_key, display


_BY_KEY, _DISPLAY = _build_index()


def lookup(name: str) -> Adsorbate | None:
    """Return the adsorbate called ``name`` (formula or alias), or None."""
    return _BY_KEY.get(_key(name))


def suggest(name: str) -> str | None:
    """Return the known name nearest to ``name`` (for error messages), or None."""
    match = difflib.get_close_matches(_key(name), list(_BY_KEY), n=1, cutoff=0.6)
    return _DISPLAY[match[0]] if match else None


@functools.lru_cache(maxsize=None)
def _coolprop_range_k(coolprop_name: str) -> tuple[float, float]:
    """(triple, critical) temperature of the fluid's equation of state."""
    from CoolProp.CoolProp import PropsSI  # slow import, see module docstring
    return PropsSI("Ttriple", coolprop_name), PropsSI("Tcrit", coolprop_name)


@functools.lru_cache(maxsize=4096)
def _saturation_pressure_pa(coolprop_name: str, temperature_k: float) -> float | None:
    try:
        t_triple, t_crit = _coolprop_range_k(coolprop_name)
        # strictly below Tc: at Tc itself the flash is unreliable and p0 has no
        # meaning for adsorption anyway
        if not (t_triple <= temperature_k < t_crit):
            return None
        from CoolProp.CoolProp import PropsSI
        p0 = float(PropsSI("P", "T", temperature_k, "Q", 0, coolprop_name))
    except Exception:  # noqa: BLE001 - a property library error means "not defined here"
        return None
    return p0 if math.isfinite(p0) and p0 > 0 else None


def saturation_pressure_pa(adsorbate: Adsorbate | str, temperature_k: float) -> float | None:
    """Return the vapour pressure in Pa of ``adsorbate`` at ``temperature_k``.

    None when the adsorbate is unknown, the temperature is not finite, below
    the triple point or at/above the critical temperature (supercritical: no
    p0). Never raises.
    """
    try:
        ads = adsorbate if isinstance(adsorbate, Adsorbate) else lookup(adsorbate)
        t = float(temperature_k)
    except Exception:  # noqa: BLE001 - documented never to raise
        return None
    if ads is None or not math.isfinite(t):
        return None
    if t > ads.critical_temperature_k + 1.0:
        return None  # clearly supercritical: no need to import CoolProp
    return _saturation_pressure_pa(ads.coolprop_name, t)
