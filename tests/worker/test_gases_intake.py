"""The six gases issue 15 names (C2H4, C3H6, SF6, H2S, SO2, NH3) through intake.

Checked against CoolProp itself (a general-purpose reference library): the
molar mass that converts mg/g to mol/kg and the saturation pressure that
turns p/p0 into Pa. The isotherm numbers are invented (truth-known).
"""
from __future__ import annotations

import numpy as np
import pytest

from sorbrank.worker.intake import read_batch

CoolProp = pytest.importorskip("CoolProp.CoolProp")

# formula as a rig would write it, CoolProp's fluid name, a temperature below Tc
GASES = [("C2H4", "Ethylene", 263.15), ("C3H6", "Propylene", 298.15),
         ("SF6", "SulfurHexafluoride", 298.15), ("H2S", "HydrogenSulfide", 298.15),
         ("SO2", "SulfurDioxide", 298.15), ("NH3", "Ammonia", 298.15)]
LOADINGS = (0.1, 0.3, 0.6, 0.9, 1.1, 1.2)


def csv_text(header: str, gas: str, temperature_k: float, pressures) -> str:
    lines = [f"sorbent_id,adsorbate,temperature_k,{header}"]
    lines += [f"TG31-G001,{gas},{temperature_k},{p!r},{q}" for p, q in zip(pressures, LOADINGS)]
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize("gas, fluid, temperature_k", GASES)
def test_absolute_units_with_a_mass_based_loading(gas, fluid, temperature_k):
    pressures_kpa = (1.0, 5.0, 10.0, 20.0, 50.0, 100.0)
    batch = read_batch(csv_text("pressure_kpa,loading_mg_per_g", gas, temperature_k, pressures_kpa),
                       "csv", batch_label="gases-absolute")
    assert batch.rejected == []
    (iso,) = batch.isotherms
    molar_mass_g_per_mol = CoolProp.PropsSI("M", fluid) * 1000.0
    np.testing.assert_allclose(iso.pressure_pa, np.array(pressures_kpa) * 1000.0, rtol=1e-12)
    # mg of gas per g of sorbent / (g/mol) = mmol/g = mol/kg
    np.testing.assert_allclose(iso.loading_mol_per_kg, np.array(LOADINGS) / molar_mass_g_per_mol,
                               rtol=1e-6)


@pytest.mark.parametrize("gas, fluid, temperature_k", GASES)
def test_relative_pressure_takes_the_saturation_pressure_of_the_property_library(
        gas, fluid, temperature_k):
    relative = (0.01, 0.05, 0.1, 0.2, 0.4, 0.6)
    batch = read_batch(csv_text("pressure_relative,loading_mmol_per_g", gas, temperature_k,
                                relative), "csv", batch_label="gases-relative")
    assert batch.rejected == []
    (iso,) = batch.isotherms
    p0_pa = CoolProp.PropsSI("P", "T", temperature_k, "Q", 0, fluid)
    assert iso.saturation_pressure_pa == pytest.approx(p0_pa, rel=1e-6)
    np.testing.assert_allclose(iso.pressure_pa, np.array(relative) * p0_pa, rtol=1e-6)


def test_ethylene_is_not_mistaken_for_methane():
    batch = read_batch(csv_text("pressure_kpa,loading_mmol_per_g", "ethylene", 298.15,
                                (1.0, 5.0, 10.0, 20.0, 50.0, 100.0)), "csv", batch_label="c2h4")
    (iso,) = batch.isotherms
    assert iso.adsorbate == "C2H4"
