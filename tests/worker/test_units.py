"""Unit conversions and the adsorbate table against outside references.

References: scipy.constants (CODATA values and SI definitions of atm, torr,
mmHg, psi, bar), CoolProp (a general thermophysical property library) for
saturation pressures, critical temperatures and molar masses, and the NIST
Chemistry WebBook for the normal boiling point of nitrogen.
"""

import numpy as np
import pytest
from CoolProp.CoolProp import PropsSI
from scipy import constants

from sorbrank.worker import adsorbates, units


# --- pressure ---------------------------------------------------------------

@pytest.mark.parametrize("unit, pa_per_unit", [
    ("Pa", 1.0),
    ("kPa", 1e3),
    ("MPa", 1e6),
    ("bar", constants.bar),          # scipy.constants: 1 bar = 1e5 Pa
    ("mbar", constants.bar / 1e3),
    ("atm", constants.atm),          # scipy.constants: 101325 Pa (standard atmosphere)
    ("torr", constants.torr),        # scipy.constants: atm / 760
    ("mmHg", constants.mmHg),        # scipy.constants: atm / 760
    ("psi", constants.psi),          # scipy.constants: pound-force per square inch
])
def test_pressure_units_match_scipy_constants(unit, pa_per_unit):
    values = np.array([0.0, 1.0, 2.5, 1234.5])
    np.testing.assert_allclose(units.pressure_to_pa(values, unit), values * pa_per_unit, rtol=1e-15)


def test_standard_pressure_equivalences():
    # 1 atm = 760 torr = 14.6959 psi (SI definitions via scipy.constants;
    # 14.6959 psi to six figures is common practice, no single source)
    assert units.pressure_to_pa(760, "torr") == pytest.approx(constants.atm, rel=1e-12)
    assert units.pressure_to_pa(14.6959488, "psi") == pytest.approx(constants.atm, rel=1e-8)
    assert units.pressure_to_pa(1.01325, "bar") == pytest.approx(constants.atm, rel=1e-12)


def test_relative_pressure_needs_and_uses_saturation_pressure():
    np.testing.assert_allclose(units.pressure_to_pa([0.1, 0.5], "p/p0", 2.0e5), [2.0e4, 1.0e5])
    with pytest.raises(units.MissingReference) as err:
        units.pressure_to_pa([0.1], "relative")
    assert err.value.field == "saturation_pressure"
    assert err.value.code == "missing_saturation_pressure"


# --- STP and loading --------------------------------------------------------

def test_stp_molar_volume_is_computed_from_codata_r():
    # R T / p at 273.15 K, 101.325 kPa with R from scipy.constants (CODATA);
    # R = N_A k exactly in the 2019 SI, which the value must also satisfy
    expected = constants.R * 273.15 / 101325.0 * 1e6
    assert units.MOLAR_VOLUME_STP_CM3_PER_MOL == pytest.approx(expected, rel=1e-15)
    via_avogadro = constants.N_A * constants.k * 273.15 / 101325.0 * 1e6
    assert units.MOLAR_VOLUME_STP_CM3_PER_MOL == pytest.approx(via_avogadro, rel=1e-12)
    # CODATA 2018 molar volume of an ideal gas at 273.15 K, 101.325 kPa:
    # 22.413 969 54 L/mol (from memory)
    assert units.MOLAR_VOLUME_STP_CM3_PER_MOL == pytest.approx(22413.96954, rel=1e-9)
    assert units.STP_TEMPERATURE_K == 273.15
    assert units.STP_PRESSURE_PA == constants.atm


CO2_G_PER_MOL = 44.009  # CIAAW atomic weights C 12.011 + 2 x O 15.999 (from memory)


@pytest.mark.parametrize("value, unit, sample_mass_g, expected_mol_per_kg", [
    (1.0, "mol/kg", None, 1.0),
    (1.0, "mmol/g", None, 1.0),
    (0.002, "mol/g", None, 2.0),
    (CO2_G_PER_MOL, "mg/g", None, 1.0),                  # 44.009 mg of CO2 = 1 mmol, per g
    (0.044009, "g/g", None, 1.0),
    (10.0, "wt%", None, 100.0 / CO2_G_PER_MOL),          # 10 g CO2 per 100 g sorbent
    (units.MOLAR_VOLUME_STP_CM3_PER_MOL / 1000, "cm3(STP)/g", None, 1.0),
    (units.MOLAR_VOLUME_STP_CM3_PER_MOL / 1000, "mL(STP)/g", None, 1.0),
    (5.0, "mmol", 2.5, 2.0),                             # 5 mmol on 2.5 g
    (0.005, "mol", 2.5, 2.0),
    (units.MOLAR_VOLUME_STP_CM3_PER_MOL * 0.005, "cm3(STP)", 2.5, 2.0),
])
def test_loading_conversions(value, unit, sample_mass_g, expected_mol_per_kg):
    got = units.loading_to_mol_per_kg([value], unit, CO2_G_PER_MOL, sample_mass_g)
    np.testing.assert_allclose(got, [expected_mol_per_kg], rtol=1e-12)


def test_absolute_loading_without_sample_mass_names_the_field():
    with pytest.raises(units.MissingReference) as err:
        units.loading_to_mol_per_kg([1.0], "mmol", CO2_G_PER_MOL)
    assert err.value.field == "sample_mass_g"
    assert err.value.code == "missing_sample_mass"


def test_every_alias_and_case_variant_is_accepted():
    for kind, table in (("pressure", units.PRESSURE_UNITS), ("loading", units.LOADING_UNITS)):
        for canonical, aliases in table.items():
            for name in (canonical, *aliases):
                for variant in (name, name.upper(), f"  {name.lower()} "):
                    assert units.normalise_unit_name(variant, kind) == canonical


def test_gas_volume_spellings():
    for name in ("cm3(STP)/g", "cm^3(STP)/g", "cm³ (STP)/g", "cm3/g STP", "ccSTP/g", "mL(STP)/g"):
        assert units.normalise_unit_name(name, "loading") == "cm3(STP)/g"


def test_unknown_unit_suggests_nearest_name():
    with pytest.raises(units.UnknownUnit) as err:
        units.normalise_unit_name("kpaa", "pressure")
    assert err.value.suggestion == "kPa"
    assert str(err.value) == "unknown pressure unit 'kpaa'; did you mean 'kPa'?"
    with pytest.raises(units.UnknownUnit) as err:
        units.normalise_unit_name("furlongs", "loading")
    assert err.value.suggestion is None


# --- adsorbate table --------------------------------------------------------

REQUIRED = ("N2", "Ar", "Kr", "CO2", "CH4", "H2", "H2O", "CO", "O2", "C2H6", "C3H8", "Xe")


@pytest.mark.parametrize("formula", REQUIRED)
def test_molar_mass_agrees_with_coolprop(formula):
    ads = adsorbates.lookup(formula)
    # CIAAW-based sums vs CoolProp's molar masses; both use standard atomic
    # weights of slightly different vintages, hence 1e-4 relative
    coolprop_g_per_mol = PropsSI("M", ads.coolprop_name) * 1000
    assert ads.molar_mass_g_per_mol == pytest.approx(coolprop_g_per_mol, rel=1e-4)
    assert set(ads.sources) >= {"molar_mass_g_per_mol", "critical_temperature_k", "cross_section_nm2"}


@pytest.mark.parametrize("formula", REQUIRED)
def test_critical_temperature_agrees_with_coolprop(formula):
    ads = adsorbates.lookup(formula)
    # typed from memory; CoolProp's equation-of-state value as the reference
    assert ads.critical_temperature_k == pytest.approx(PropsSI("Tcrit", ads.coolprop_name), abs=0.05)


def test_bet_cross_sections():
    # IUPAC 2015 physisorption report (Thommes et al., Pure Appl. Chem. 87 (2015) 1051):
    # N2 0.162 nm2; Ar 0.142 nm2 and Kr 0.202 nm2 (same report, from memory)
    assert adsorbates.lookup("N2").cross_section_nm2 == 0.162
    assert adsorbates.lookup("Ar").cross_section_nm2 == 0.142
    assert adsorbates.lookup("Kr").cross_section_nm2 == 0.202
    assert adsorbates.lookup("CO2").cross_section_nm2 is None


@pytest.mark.parametrize("name, formula", [
    ("nitrogen", "N2"), ("NITROGEN", "N2"), ("n2", "N2"), ("carbon dioxide", "CO2"),
    ("Carbon_Dioxide", "CO2"), ("CarbonDioxide", "CO2"), ("water vapour", "H2O"),
    ("n-propane", "C3H8"), ("propane", "C3H8"), ("xenon", "Xe"), ("co", "CO"),
])
def test_lookup_by_alias(name, formula):
    assert adsorbates.lookup(name).id == formula


def test_lookup_unknown_and_suggest():
    assert adsorbates.lookup("unobtainium") is None
    assert adsorbates.suggest("nitrogn") == "nitrogen"
    assert adsorbates.suggest("carbon dioxid") == "carbon dioxide"
    assert adsorbates.suggest("qqqqqqqqqq") is None


def test_nitrogen_normal_boiling_point():
    # NIST Chemistry WebBook: N2 boils at 77.355 K under 101.325 kPa (from memory);
    # 0.1 % covers the last digit of the temperature (dp0/dT ~ 12 kPa/K)
    assert adsorbates.saturation_pressure_pa("N2", 77.355) == pytest.approx(101325.0, rel=1e-3)


@pytest.mark.parametrize("formula, temperature_k", [
    ("N2", 77.0), ("Ar", 87.3), ("CO2", 273.15), ("CH4", 111.7), ("H2O", 298.15), ("Kr", 120.0),
])
def test_saturation_pressure_is_coolprop_value(formula, temperature_k):
    ads = adsorbates.lookup(formula)
    expected = PropsSI("P", "T", temperature_k, "Q", 0, ads.coolprop_name)  # CoolProp reference
    # the shipped table interpolates CoolProp within 1e-7 (worker/saturation_table.py)
    assert adsorbates.saturation_pressure_pa(ads, temperature_k) == pytest.approx(expected, rel=1e-6)


@pytest.mark.parametrize("adsorbate, temperature_k", [
    ("N2", 300.0),        # supercritical
    ("N2", 126.5),        # just above CoolProp's critical point, inside the +1 K shortcut
    ("CO2", 195.0),       # below the triple point (216.6 K): sublimation, no liquid p0
    ("N2", float("nan")), ("N2", -5.0), ("N2", "warm"), ("unobtainium", 77.0), (None, None),
])
def test_saturation_pressure_undefined_is_none_never_raises(adsorbate, temperature_k):
    assert adsorbates.saturation_pressure_pa(adsorbate, temperature_k) is None


# --- units carried in column names ------------------------------------------

# each token's unit, with its value in Pa or mol/kg from an outside definition
PRESSURE_TOKENS = {   # scipy.constants (CODATA / SI definitions)
    "pa": 1.0, "kpa": 1e3, "mpa": 1e6, "bar": constants.bar, "mbar": constants.bar / 1e3,
    "atm": constants.atm, "torr": constants.torr, "mmhg": constants.mmHg, "psi": constants.psi,
}
STP_CM3_PER_MMOL = constants.R * 273.15 / constants.atm * 1e3   # ideal gas at 273.15 K, 1 atm
LOADING_TOKENS = {    # mol/kg per unit for CO2 (CIAAW-based molar mass above, from memory)
    "mol_per_kg": 1.0, "mmol_per_g": 1.0, "mol_per_g": 1e3,
    "mg_per_g": 1.0 / CO2_G_PER_MOL, "g_per_g": 1e3 / CO2_G_PER_MOL,
    "wt_percent": 10.0 / CO2_G_PER_MOL,           # 1 g per 100 g sorbent = 10 g/kg
    "cm3stp_per_g": 1.0 / STP_CM3_PER_MMOL,
}
ABSOLUTE_TOKENS = {"mmol": 1e-3, "mol": 1.0, "cm3stp": 1e-3 / STP_CM3_PER_MMOL}  # mol per unit


def test_token_tables_are_the_documented_ones():
    assert set(units.COLUMN_TOKENS["pressure"]) == set(PRESSURE_TOKENS) | {"relative"}
    assert set(units.COLUMN_TOKENS["loading"]) == set(LOADING_TOKENS) | set(ABSOLUTE_TOKENS)


@pytest.mark.parametrize("token, pa_per_unit", PRESSURE_TOKENS.items())
def test_every_pressure_token_converts_like_its_definition(token, pa_per_unit):
    quantity, unit = units.unit_column(f"pressure_{token}")
    assert quantity == "pressure"
    np.testing.assert_allclose(units.pressure_to_pa([2.5], unit), [2.5 * pa_per_unit], rtol=1e-15)
    assert units.unit_column(f"Saturation_Pressure_{token.upper()}") == ("saturation_pressure", unit)
    assert units.column_name("pressure", unit) == f"pressure_{token}"


@pytest.mark.parametrize("token, mol_per_kg_per_unit", LOADING_TOKENS.items())
def test_every_loading_token_converts_like_its_definition(token, mol_per_kg_per_unit):
    quantity, unit = units.unit_column(f"loading_{token}")
    assert quantity == "loading"
    got = units.loading_to_mol_per_kg([3.0], unit, CO2_G_PER_MOL)
    np.testing.assert_allclose(got, [3.0 * mol_per_kg_per_unit], rtol=1e-12)
    assert units.unit_column(f"loading_sigma_{token}") == ("loading_sigma", unit)
    assert units.column_name("loading", unit) == f"loading_{token}"


@pytest.mark.parametrize("token, mol_per_unit", ABSOLUTE_TOKENS.items())
def test_absolute_tokens_divide_by_the_sample_mass(token, mol_per_unit):
    _, unit = units.unit_column(f"loading_{token}")
    got = units.loading_to_mol_per_kg([3.0], unit, CO2_G_PER_MOL, sample_mass_g=0.5)
    np.testing.assert_allclose(got, [3.0 * mol_per_unit / 0.5e-3], rtol=1e-12)


def test_relative_token_and_plain_columns():
    assert units.unit_column("pressure_relative") == ("pressure", "p/p0")
    assert units.unit_column("pressure") == ("pressure", None)
    assert units.unit_column("loading_sigma") == ("loading_sigma", None)
    assert units.unit_column("sorbent_id") is None
    assert units.unit_column("temperature_k") is None


@pytest.mark.parametrize("name, hint", [("pressure_kpaa", "pressure_kpa"),
                                        ("loading_mmol_per_gram", "loading_mmol_per_g"),
                                        ("saturation_pressure_relative", None),
                                        ("loading_sigma_kpa", None)])
def test_unknown_token_names_the_column_and_the_nearest(name, hint):
    with pytest.raises(units.UnknownColumnUnit) as err:
        units.unit_column(name)
    assert err.value.field == name and err.value.code == "unknown_unit"
    assert (f"did you mean '{hint}'?" in str(err.value)) if hint else "did you mean" not in str(err.value)


# --- the units declaration --------------------------------------------------

def test_declaration_text_and_mapping_are_one():
    expected = {"pressure": "kPa", "loading": "mmol/g"}
    assert units.parse_units_declaration("pressure:kPa,loading:mmol/g") == expected
    assert units.parse_units_declaration(" Pressure : KPA ; loading: mmol_per_g ") == expected
    assert units.parse_units_declaration({"pressure": "kilopascal", "loading": "mmol/g"}) == expected
    assert units.format_units_declaration(expected) == "pressure:kPa,loading:mmol/g"
    assert units.parse_units_declaration("saturation_pressure:bar,loading_sigma:mg/g") == \
        {"saturation_pressure": "bar", "loading_sigma": "mg/g"}


@pytest.mark.parametrize("value, words", [
    ("presure:kPa", "did you mean 'pressure'?"), ("pressure kPa", "is not quantity:unit"),
    ("pressure:kPa,pressure:bar", "declared twice"), ("", "is empty"), (42, "not int"),
    ("pressure:", "needs a unit name"), ("saturation_pressure:p/p0", "absolute"),
    ("pressure:kpaa", "did you mean 'kPa'?"),
])
def test_bad_declarations_say_what_is_wrong(value, words):
    with pytest.raises(ValueError) as err:
        units.parse_units_declaration(value)
    assert words in str(err.value)


# --- exactness: power-of-ten conversions are correctly rounded ---------------
# The reference is exact rational arithmetic (fractions.Fraction; float(Fraction) is
# correctly rounded, Python documentation): the double nearest the exact product of
# the value read and the power of ten.

def _decimal_values(n: int, seed: int) -> np.ndarray:
    """Values as rigs write them: 2-7 significant digits over many decades (invented)."""
    rng = np.random.default_rng(seed)
    digits = rng.integers(2, 8, n)
    return np.array([float(f"{m:.{d - 1}e}") for m, d in
                     zip(10.0 ** rng.uniform(-6, 6, n), digits)])


@pytest.mark.parametrize("unit, power", [("Pa", 0), ("kPa", 3), ("MPa", 6), ("bar", 5),
                                         ("mbar", 2)])
def test_power_of_ten_pressures_are_correctly_rounded(unit, power):
    from fractions import Fraction

    values = _decimal_values(3000, power)
    exact = [float(Fraction(v) * 10 ** power) for v in values]
    assert units.pressure_to_pa(values, unit).tolist() == exact


@pytest.mark.parametrize("unit, power", [("mol/kg", 0), ("mmol/g", 0), ("mol/g", 3)])
def test_power_of_ten_loadings_are_correctly_rounded(unit, power):
    from fractions import Fraction

    values = _decimal_values(3000, 10 + power)
    exact = [float(Fraction(v) * 10 ** power) for v in values]
    assert units.loading_to_mol_per_kg(values, unit, CO2_G_PER_MOL).tolist() == exact


def test_mmol_on_a_sample_mass_is_the_correctly_rounded_quotient():
    from fractions import Fraction

    # mmol per g of sample is mol/kg: one division. Multiplying by 0.001 and dividing
    # by the mass in kg (the former way) missed the nearest double for ~37 % of these.
    amounts_mmol, masses_g = _decimal_values(3000, 21), _decimal_values(3000, 22)
    got = units.loading_to_mol_per_kg(amounts_mmol, "mmol", CO2_G_PER_MOL, masses_g)
    assert got.tolist() == [float(Fraction(a) / Fraction(m)) for a, m in zip(amounts_mmol, masses_g)]
    assert units.loading_to_mol_per_kg([3.1], "mmol", CO2_G_PER_MOL, 1000.0).tolist() == [0.0031]


def test_scaled_by_divides_for_negative_powers_of_ten():
    assert units.scaled_by([3.1], 1e-3).tolist() == [0.0031]   # 3.1 * 0.001 is 0.0031000000000000003
    assert units.scaled_by([3.1], 1e3).tolist() == [3100.0]
    assert units.scaled_by([3.0], 0.5).tolist() == [1.5]      # not a power of ten: multiplied


def test_other_conversions_stay_within_two_roundings():
    from fractions import Fraction

    # torr, psi, g/g and cm3(STP)/g take a second rounding at most: a relative error of
    # at most 2 units in the last place against the exact product of the factors used
    values = _decimal_values(2000, 30)
    eps = np.finfo(float).eps
    for got, factor in ((units.pressure_to_pa(values, "torr"), Fraction(constants.torr)),
                        (units.pressure_to_pa(values, "psi"), Fraction(constants.psi)),
                        (units.loading_to_mol_per_kg(values, "g/g", CO2_G_PER_MOL),
                         Fraction(1000) / Fraction(CO2_G_PER_MOL))):
        exact = np.array([float(Fraction(v) * factor) for v in values])
        assert np.all(np.abs(got - exact) <= 2 * eps * np.abs(exact))
