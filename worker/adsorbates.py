"""The adsorbate property table: names, molar mass, BET cross-section, p0.

Every fluid CoolProp lists is known, read from ``data/fluids.json`` and
``data/saturation_curves.f64``, which ``python -m sorbrank.worker.saturation_table``
generates from CoolProp (the version is recorded in the file). CoolProp itself
is never imported here: its import alone takes seconds, on every start.

Each Adsorbate carries a ``sources`` dict naming where every value comes
from. The gases in ``_CURATED`` add what the property library does not give:
a formula-style id, common names, BET cross-sections with their sources, and
molar masses summed from CIAAW standard atomic weights.

Names match without regard to case, spaces or punctuation ("Carbon_Dioxide"
is CO2). A formula matches by composition, so "H3N" is NH3; a formula shared
by several fluids (C4H10: n-butane and isobutane) finds none, and
``suggestions`` lists them all. C3H6 is the one curated exception: it means
propylene, as in the propane/propylene separation literature; cyclopropane is
found by name.

Saturation pressures are defined from the triple point to just below the
critical point (1e-8 of Tc). Below the triple point there is no liquid in
equilibrium, so there is no p0: krypton at 77 K (triple point 115.8 K) gets
None, as does any supercooled liquid. Relative pressures alone (p/p0, BET) of
Kr and Ar below their triple points refer to the supercooled liquid, by the
trade's convention: ``relative_pressure_p0_pa`` (see
``supercooled_liquid_saturation_pressure_pa``). Reading the curves and the
supercooled-liquid method live in ``worker/saturation.py``; this module turns
names into gases and gases into calls there.
"""
from __future__ import annotations

import json
import math
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field

from . import saturation
from .saturation_table import DATA_DIR, FLUIDS_FILE


# CIAAW standard atomic weights, conventional values (from memory)
_ATOMIC_WEIGHT_G_PER_MOL = {
    "H": 1.008, "C": 12.011, "N": 14.007, "O": 15.999,
    "Ar": 39.948, "Kr": 83.798, "Xe": 131.293,
}
_MOLAR_MASS_SOURCE = "sum of CIAAW standard atomic weights (from memory)"
_IUPAC_2015 = ("IUPAC 2015 physisorption report, Thommes et al., "
               "Pure Appl. Chem. 87 (2015) 1051")
_DECLARED_SOURCE = "declared by the user"

# A declared gas may reuse a known name only with this molar mass (relative):
# loose enough for a molar mass typed to one decimal (CH4 as 16.0), tight
# enough that no two fluids of the table are confused (N2 28.01, C2H4 28.05
# differ by 0.15 %, but then their names differ too).
DECLARED_MOLAR_MASS_RTOL = 0.01
DECLARED_CRITICAL_TEMPERATURE_TOL_K = 1.0
_MAX_NAME_LENGTH = 100


@dataclass(frozen=True)
class Adsorbate:
    id: str                                  # formula for common gases ("CO2"), else a name
    names: tuple[str, ...]                   # aliases, matched case- and punctuation-insensitively
    molar_mass_g_per_mol: float
    cross_section_nm2: float | None          # BET molecular cross-section
    coolprop_name: str | None                # None for a gas the user declared
    critical_temperature_k: float | None     # None when a declared gas does not give one
    sources: dict[str, str] = field(default_factory=dict, compare=False)
    formula: str | None = None               # Hill order (C, H, then alphabetical)
    cas: str | None = None
    triple_point_temperature_k: float | None = None
    declared: bool = False


# CoolProp name -> (id, common names, CIAAW composition or None, cross-section nm2, its source)
_CURATED: dict[str, tuple[str, tuple[str, ...], dict[str, int] | None, float | None, str | None]] = {
    "Nitrogen": ("N2", ("nitrogen",), {"N": 2}, 0.162, f"{_IUPAC_2015} (N2 at 77 K)"),
    "Argon": ("Ar", ("argon",), {"Ar": 1}, 0.142, f"{_IUPAC_2015} (Ar at 87 K) (from memory)"),
    "Krypton": ("Kr", ("krypton",), {"Kr": 1}, 0.202, f"{_IUPAC_2015} (Kr at 77 K) (from memory)"),
    "CarbonDioxide": ("CO2", ("carbon dioxide",), {"C": 1, "O": 2}, None, None),
    "Methane": ("CH4", ("methane",), {"C": 1, "H": 4}, None, None),
    "Hydrogen": ("H2", ("hydrogen",), {"H": 2}, None, None),
    "Water": ("H2O", ("water", "water vapour", "water vapor"), {"H": 2, "O": 1}, None, None),
    "CarbonMonoxide": ("CO", ("carbon monoxide",), {"C": 1, "O": 1}, None, None),
    "Oxygen": ("O2", ("oxygen",), {"O": 2}, None, None),
    "Ethane": ("C2H6", ("ethane",), {"C": 2, "H": 6}, None, None),
    "n-Propane": ("C3H8", ("propane", "n-propane"), {"C": 3, "H": 8}, None, None),
    "Xenon": ("Xe", ("xenon",), {"Xe": 1}, None, None),
    "Ethylene": ("C2H4", ("ethylene", "ethene"), None, None, None),
    "Propylene": ("C3H6", ("propylene", "propene"), None, None, None),
    "SulfurHexafluoride": ("SF6", ("sulfur hexafluoride", "sulphur hexafluoride"), None, None, None),
    "HydrogenSulfide": ("H2S", ("hydrogen sulfide", "hydrogen sulphide"), None, None, None),
    "SulfurDioxide": ("SO2", ("sulfur dioxide", "sulphur dioxide"), None, None, None),
    "Ammonia": ("NH3", ("ammonia",), None, None, None),
    "NitrousOxide": ("N2O", ("nitrous oxide", "dinitrogen monoxide"), None, None, None),
    "Helium": ("He", ("helium",), None, None, None),
    "Neon": ("Ne", ("neon",), None, None, None),
    "Deuterium": ("D2", ("deuterium",), None, None, None),
    "HeavyWater": ("D2O", ("heavy water",), None, None, None),
    "Fluorine": ("F2", ("fluorine",), None, None, None),
    "Chlorine": ("Cl2", ("chlorine",), None, None, None),
    "HydrogenChloride": ("HCl", ("hydrogen chloride",), None, None, None),
    "CarbonylSulfide": ("COS", ("carbonyl sulfide", "carbonyl sulphide"), None, None, None),
    "n-Butane": ("n-C4H10", ("n-butane", "butane"), None, None, None),
    "IsoButane": ("i-C4H10", ("isobutane", "iso-butane", "2-methylpropane"), None, None, None),
    "IsoButene": ("IsoButene", ("isobutene", "isobutylene", "2-methylpropene"), None, None, None),
}

# element symbols a formula may use (D: deuterium, as CoolProp writes it)
_ELEMENTS = frozenset(
    "H D He Li Be B C N O F Ne Na Mg Al Si P S Cl Ar K Ca Ti Cr Fe Ni Cu Zn Ga Ge As Se Br Kr "
    "Rb Sr Ag Sn Sb Te I Xe Cs Ba W Pt Au Hg Pb Bi Rn U".split())
_FORMULA_TOKEN = re.compile(r"([A-Z][a-z]?)(\d*)")
_PARENTHESISED = re.compile(r"\([^)]*\)")


def parse_formula(text: str) -> dict[str, int] | None:
    """Element counts of a formula ("C2H4", "CF3CH=CHCl", CoolProp's "C_{2}H_{4}"), or None.

    Case matters: "Co" is cobalt, "CO" carbon monoxide. Structural bonds
    ("=") and parenthesised remarks ("(trans)") are ignored.
    """
    if not isinstance(text, str) or not text[:1].isupper():
        return None
    plain = text.replace("_{", "").replace("}", "").replace("=", "").replace(" ", "")
    if "(" in plain:
        plain = _PARENTHESISED.sub("", plain)
    counts: dict[str, int] = {}
    position = 0
    for match in _FORMULA_TOKEN.finditer(plain):
        if match.start() != position or match.group(1) not in _ELEMENTS:
            return None
        position = match.end()
        n = int(match.group(2) or 1)
        if n == 0:
            return None
        counts[match.group(1)] = counts.get(match.group(1), 0) + n
    return counts if position == len(plain) else None


def hill_formula(counts: Mapping[str, int]) -> str:
    """Hill order: C, then H, then the rest alphabetically (all alphabetical without C)."""
    first = [e for e in ("C", "H") if e in counts] if "C" in counts else []
    order = first + sorted(e for e in counts if e not in first)
    return "".join(e + (str(counts[e]) if counts[e] != 1 else "") for e in order)


_NOT_ALPHANUMERIC = re.compile(r"[\W_]+")


def _key(name: str) -> str:
    """Compare names without case, spaces or punctuation."""
    return _NOT_ALPHANUMERIC.sub("", str(name).casefold())


def _composition_key(counts: Mapping[str, int]) -> frozenset:
    return frozenset(counts.items())


def _read_table() -> dict:
    return json.loads((DATA_DIR / FLUIDS_FILE).read_text(encoding="utf-8"))


_TABLE = _read_table()
COOLPROP_VERSION: str = _TABLE["coolprop_version"]
_CURVE_OF: dict[str, dict] = {f["coolprop_name"]: f["curve"] for f in _TABLE["fluids"] if f["curve"]}


def _make(record: dict, composition_count: dict[frozenset, int]) -> Adsorbate:
    name = record["coolprop_name"]
    counts = parse_formula(record["formula_coolprop"] or "")
    formula = hill_formula(counts) if counts else None
    composition_unique = counts is not None and composition_count[_composition_key(counts)] == 1
    curated = _CURATED.get(name)
    # CoolProp's formula-like aliases ("C2H6O" for ethanol) name the fluid only when no
    # other fluid has that composition
    aliases = record["aliases"] if composition_unique or counts is None else [
        a for a in record["aliases"] if parse_formula(a) != counts]
    coolprop = f"CoolProp {COOLPROP_VERSION}"
    sources = {
        "critical_temperature_k": f"{coolprop} critical temperature (equation of state)",
        "saturation_pressure_pa": (
            f"table generated from {coolprop} PropsSI('P','T',T,'Q',0,fluid), "
            f"triple point to critical point (worker/saturation_table.py)"
            if record["curve"] else
            f"none: {name} is a pseudo-pure fluid in {coolprop}, bubble and dew pressures differ"),
        "cross_section_nm2": "not tabulated (no solid source)",
    }
    molar_mass = record["molar_mass_kg_per_mol"] * 1000.0
    sources["molar_mass_g_per_mol"] = f"{coolprop} molar mass"
    if curated:
        id_, common, composition, cross_section, cross_section_source = curated
        if composition:
            molar_mass = sum(_ATOMIC_WEIGHT_G_PER_MOL[e] * n for e, n in composition.items())
            sources["molar_mass_g_per_mol"] = _MOLAR_MASS_SOURCE
        if cross_section_source:
            sources["cross_section_nm2"] = cross_section_source
        names = (*common, name, *aliases)
    else:
        formula_aliases = [a for a in aliases if counts and any(ch.isdigit() for ch in a)
                           and parse_formula(a) == counts] if composition_unique else []
        id_ = formula_aliases[0] if formula_aliases else name
        cross_section = None
        names = (name, *aliases)
    names = tuple(dict.fromkeys(n for n in names if n != id_))
    return Adsorbate(id_, names, molar_mass, cross_section, name, record["critical_temperature_k"],
                     sources, formula, record["cas"], record["triple_point_temperature_k"])


def _build() -> tuple[dict[str, Adsorbate], dict[str, tuple[Adsorbate, ...]], dict[str, str],
                      dict[frozenset, tuple[Adsorbate, ...]]]:
    compositions: dict[frozenset, int] = {}
    for record in _TABLE["fluids"]:
        counts = parse_formula(record["formula_coolprop"] or "")
        if counts:
            compositions[_composition_key(counts)] = compositions.get(_composition_key(counts), 0) + 1
    records = sorted(_TABLE["fluids"], key=lambda r: r["coolprop_name"] not in _CURATED)
    everything = [_make(r, compositions) for r in records]
    by_id = {a.id: a for a in everything}
    by_key: dict[str, list[Adsorbate]] = {}
    display: dict[str, str] = {}
    for ads in everything:
        for name in (ads.id, *ads.names):
            found = by_key.setdefault(_key(name), [])
            if ads not in found:
                found.append(ads)
            display.setdefault(_key(name), name)
    by_composition: dict[frozenset, list[Adsorbate]] = {}
    for ads in everything:
        # a formula is written by hill_formula, so it parses back
        if ads.formula and (composition := parse_formula(ads.formula)):
            by_composition.setdefault(_composition_key(composition), []).append(ads)
    # a curated formula id claims its composition (C3H6 is propylene, see the docstring)
    for ads in everything:
        counts = parse_formula(ads.id)
        if ads.coolprop_name in _CURATED and counts:
            by_composition[_composition_key(counts)] = [ads]
            by_key[_key(ads.id)] = [ads]
    return (by_id, {k: tuple(v) for k, v in by_key.items()}, display,
            {k: tuple(v) for k, v in by_composition.items()})


ADSORBATES, _BY_KEY, _DISPLAY, _BY_COMPOSITION = _build()


def _declared_adsorbates(declared: Mapping[str, Adsorbate] | Iterable[Adsorbate] | None
                         ) -> Iterable[Adsorbate]:
    if declared is None:
        return ()
    if isinstance(declared, Mapping):
        return declared.values()
    return declared


def _candidates(name: object) -> tuple[Adsorbate, ...]:
    """Every known fluid ``name`` may mean: by name, else by formula."""
    if not isinstance(name, str):
        return ()
    found = _BY_KEY.get(_key(name))
    if found:
        return found
    counts = parse_formula(name.strip())
    return _BY_COMPOSITION.get(_composition_key(counts), ()) if counts else ()


def lookup(name: str, declared: Mapping[str, Adsorbate] | Iterable[Adsorbate] | None = None
           ) -> Adsorbate | None:
    """Return the adsorbate called ``name`` (formula or alias), or None.

    ``declared`` (Adsorbates from ``declare``, as a list or a mapping) is
    consulted first. None also when ``name`` is a formula several fluids
    share (``suggestions`` lists them).
    """
    if not isinstance(name, str):
        return None
    key = _key(name)
    for ads in _declared_adsorbates(declared):
        if isinstance(ads, Adsorbate) and key in {_key(n) for n in (ads.id, *ads.names)}:
            return ads
    found = _candidates(name)
    return found[0] if len(found) == 1 else None


def _edit_distance(a: str, b: str) -> int:
    """Optimal string alignment distance: insertions, deletions, substitutions, swaps."""
    previous2: list[int] = []
    previous = list(range(len(b) + 1))
    for i, ca in enumerate(a, 1):
        current = [i] + [0] * len(b)
        for j, cb in enumerate(b, 1):
            current[j] = min(previous[j] + 1, current[j - 1] + 1, previous[j - 1] + (ca != cb))
            if i > 1 and j > 1 and ca == b[j - 2] and a[i - 2] == cb:
                current[j] = min(current[j], previous2[j - 2] + 1)
        previous2, previous = previous, current
    return previous[-1]


def _typo_allowance(key: str) -> int:
    # short names are too close to each other for a guess to help
    return 0 if len(key) < 5 else 1 if len(key) < 9 else 2


_DIGITS = re.compile(r"\d+")


def suggestions(name: str) -> list[str]:
    """Known names ``name`` may have meant, for error messages; [] when none fits.

    A formula shared by several fluids lists them all. Otherwise a suggestion
    is offered only for a near typo: a formula with zero for O ("C02"), or a
    name a letter or two off ("nitrogn"). A typo never changes a number, so
    C2H4 never suggests CH4, nor R32 R23.
    """
    if not isinstance(name, str) or len(name) > _MAX_NAME_LENGTH:
        return []
    found = _candidates(name)
    if len(found) > 1:
        return [a.id for a in found]
    if found or lookup(name) is not None:
        return []
    out: list[str] = []
    stripped = name.strip()
    if "0" in stripped:
        # "C02", "H20": a zero typed for the letter O
        for position in [i for i, ch in enumerate(stripped) if ch == "0"]:
            variant = stripped[:position] + "O" + stripped[position + 1:]
            if parse_formula(variant) is not None:
                out += [a.id for a in _candidates(variant) if a.id not in out]
        if out:
            return out
    key = _key(name)
    allowance = _typo_allowance(key)
    if not allowance:
        return []
    digits = _DIGITS.findall(key)
    best = allowance + 1
    seen: set[str] = set()
    for known_key, fluids in _BY_KEY.items():
        if abs(len(known_key) - len(key)) > allowance or _DIGITS.findall(known_key) != digits:
            continue
        distance = _edit_distance(key, known_key)
        if distance < best:
            best, out, seen = distance, [], set()
        if distance == best:
            for ads in fluids:
                if ads.id not in seen:
                    seen.add(ads.id)
                    out.append(_DISPLAY[known_key])
    return list(dict.fromkeys(out)) if best <= allowance else []


def suggest(name: str) -> str | None:
    """The ``suggestions`` as one phrase ("nitrogen", "n-C4H10 or i-C4H10"), or None."""
    found = suggestions(name)
    return " or ".join(found) if found else None


def _finite_positive(value: object, what: str, upper: float) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ValueError(f"{what} must be a number, not {value!r}")
    value = float(value)
    if not (math.isfinite(value) and 0 < value <= upper):
        raise ValueError(f"{what} must be a finite number above 0 and at most {upper:g}, not {value!r}")
    return value


def declare(name: str, molar_mass_g_per_mol: float, critical_temperature_k: float | None = None
            ) -> Adsorbate:
    """An adsorbate the user names, for loadings in absolute units (no p0).

    A name the table already knows is accepted only with that gas's molar
    mass (within ``DECLARED_MOLAR_MASS_RTOL``) and critical temperature, and
    then the known gas is returned, p0 and all. Raises ValueError.
    """
    if not isinstance(name, str) or not name.strip():
        raise ValueError(f"a declared gas needs a name, not {name!r}")
    name = name.strip()
    if len(name) > _MAX_NAME_LENGTH or not _key(name):
        raise ValueError(f"declared gas name {name[:40]!r} must be at most {_MAX_NAME_LENGTH} "
                         f"characters with at least one letter or digit")
    molar_mass = _finite_positive(molar_mass_g_per_mol, f"molar mass of declared gas {name!r} (g/mol)",
                                  100_000.0)
    t_crit = (None if critical_temperature_k is None else
              _finite_positive(critical_temperature_k,
                               f"critical temperature of declared gas {name!r} (K)", 100_000.0))
    known = _candidates(name)
    if len(known) > 1:
        raise ValueError(f"declared gas {name!r} is a formula several known gases share "
                         f"({', '.join(a.id for a in known)}); name one of them or choose another name")
    if known:
        gas = known[0]
        if abs(molar_mass - gas.molar_mass_g_per_mol) > DECLARED_MOLAR_MASS_RTOL * gas.molar_mass_g_per_mol:
            raise ValueError(f"declared gas {name!r} is the known gas {gas.id} but its molar mass "
                             f"{molar_mass:g} g/mol is not {gas.id}'s {gas.molar_mass_g_per_mol:.4g} g/mol; "
                             f"choose another name for a different gas")
        # every gas of the table has its critical temperature (CoolProp's)
        if (t_crit is not None and gas.critical_temperature_k is not None
                and abs(t_crit - gas.critical_temperature_k) > DECLARED_CRITICAL_TEMPERATURE_TOL_K):
            raise ValueError(f"declared gas {name!r} is the known gas {gas.id} but its critical temperature "
                             f"{t_crit:g} K is not {gas.id}'s {gas.critical_temperature_k:.2f} K")
        return gas
    sources = {
        "molar_mass_g_per_mol": _DECLARED_SOURCE,
        "critical_temperature_k": _DECLARED_SOURCE if t_crit is not None else "not declared",
        "saturation_pressure_pa": "none: a declared gas has no saturation curve",
        "cross_section_nm2": "not tabulated (declared gas)",
    }
    return Adsorbate(name, (), molar_mass, None, None, t_crit, sources, declared=True)


def saturation_pressure_pa(adsorbate: Adsorbate | str, temperature_k: float) -> float | None:
    """Return the vapour pressure in Pa of ``adsorbate`` at ``temperature_k``.

    None when the adsorbate is unknown or declared (no curve), a pseudo-pure
    fluid, the temperature is not finite, below the triple point (krypton at
    77 K: see the module docstring) or within 1e-8 of Tc or above it
    (supercritical: no p0). Never raises.
    """
    try:
        ads = adsorbate if isinstance(adsorbate, Adsorbate) else lookup(adsorbate)
        t = float(temperature_k)
        if ads is None or ads.coolprop_name is None or not math.isfinite(t):
            return None
        curve = _CURVE_OF.get(ads.coolprop_name)
        if curve is None or ads.critical_temperature_k is None:
            return None
        return saturation.curve_saturation_pressure_pa(curve, ads.critical_temperature_k, t)
    except Exception:  # noqa: BLE001 - documented never to raise
        return None


def supercooled_liquid_saturation_pressure_pa(adsorbate: Adsorbate | str, temperature_k: float
                                               ) -> float | None:
    """p0 in Pa of the supercooled liquid of Kr or Ar below its triple point, for relative pressures.

    The method and its constants are in ``worker/saturation.py``
    (``supercooled_liquid_p0_pa``). None for other gases and declared ones, at
    or above the triple point (``saturation_pressure_pa`` applies there) and
    below ``saturation.SUPERCOOLED_LOWEST_TEMPERATURE_K``. Never raises.
    """
    try:
        ads = adsorbate if isinstance(adsorbate, Adsorbate) else lookup(adsorbate)
        t = float(temperature_k)
        if ads is None or ads.declared:
            return None
        return saturation.supercooled_liquid_p0_pa(
            ads.id, ads.triple_point_temperature_k,
            lambda t_k: saturation_pressure_pa(ads, t_k), t)
    except Exception:  # noqa: BLE001 - documented never to raise
        return None


def relative_pressure_p0_pa(adsorbate: Adsorbate | str, temperature_k: float) -> float | None:
    """The p0 in Pa that relative pressures (p/p0, BET) refer to.

    The saturation pressure where there is one; below the triple point of Kr
    or Ar, the supercooled-liquid p0 (``supercooled_liquid_saturation_pressure_pa``);
    otherwise None. Never raises.
    """
    p0 = saturation_pressure_pa(adsorbate, temperature_k)
    return p0 if p0 is not None else supercooled_liquid_saturation_pressure_pa(adsorbate, temperature_k)


def uses_supercooled_liquid_p0(adsorbate: Adsorbate | str, temperature_k: float) -> bool:
    """True where ``relative_pressure_p0_pa`` gives a supercooled-liquid p0."""
    return (saturation_pressure_pa(adsorbate, temperature_k) is None
            and supercooled_liquid_saturation_pressure_pa(adsorbate, temperature_k) is not None)
