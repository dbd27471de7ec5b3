"""Truth-known Langmuir isotherms of invented Tideglass-31 sorbents, shared by
the Python API and the HTTP client tests: q = q_sat b p / (1 + b p), noise-free."""
from __future__ import annotations

import numpy as np
import pandas as pd

PRESSURES_KPA = (0.5, 1, 2, 5, 10, 20, 40, 60, 80, 100, 120, 150)
# (sorbent, adsorbate, temperature_k, q_sat mmol/g, b 1/kPa)
TRUTH = [
    ("TG31-0001", "CO2", 298.15, 4.2, 0.05),
    ("TG31-0001", "CO2", 273.15, 4.2, 0.11),
    ("TG31-0002", "CO2", 298.15, 2.6, 0.30),
    ("TG31-0002", "N2", 298.15, 2.6, 0.004),
]


def langmuir_mmol_per_g(q_sat: float, b_per_kpa: float, p_kpa) -> np.ndarray:
    p = np.asarray(p_kpa, dtype=float)
    return q_sat * b_per_kpa * p / (1 + b_per_kpa * p)


def frame(truth=TRUTH) -> pd.DataFrame:
    rows = []
    for sorbent, gas, t_k, q_sat, b in truth:
        for p, q in zip(PRESSURES_KPA, langmuir_mmol_per_g(q_sat, b, PRESSURES_KPA)):
            rows.append({"sorbent_id": sorbent, "adsorbate": gas, "temperature_k": t_k,
                         "pressure_kpa": p, "loading_mmol_per_g": float(q)})
    return pd.DataFrame(rows)


def plain(df: pd.DataFrame) -> pd.DataFrame:
    return df.rename(columns={"pressure_kpa": "pressure", "loading_mmol_per_g": "loading"})


def by_isotherm(summary: pd.DataFrame) -> pd.DataFrame:
    return summary.sort_values("isotherm_id").reset_index(drop=True)
