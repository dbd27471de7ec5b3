"""The one table of model test cases: a row per catalogue model drives every
generic model test (tests/worker/test_models.py), the engine's truth-recovery tests
(tests/worker/test_engine.py) and the metrics robustness sweep.

Each row writes the model's published equation again in scalar Python math,
from the paper named beside it, so the vectorised class is checked against
an independent transcription. Truth parameters are invented, chosen inside
the usual published ranges (truth-known synthetic tests).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from scipy.constants import R  # CODATA molar gas constant, J/mol/K

# conditions of the engine's truth-recovery rows (invented, truth-known)
ENGINE_TEMPERATURE_K = 300.0
ENGINE_SATURATION_PRESSURE_PA = 1.0e6


def _u(rng, lo, hi):
    return rng.uniform(lo, hi)


def _lu(rng, lo, hi):
    return math.exp(rng.uniform(math.log(lo), math.log(hi)))


@dataclass(frozen=True)
class ModelCase:
    model_id: str
    param_names: tuple[str, ...]          # a contract once released
    equation: Callable[..., float]        # published form: equation(x, temperature_k, *params)
    truths: tuple[tuple[float, tuple[float, ...]], ...]   # (temperature_k, params)
    sample: Callable[[np.random.Generator], tuple[float, ...]]  # random params inside bounds
    # engine recovery: (params, pressures in Pa) at ENGINE_TEMPERATURE_K and,
    # for p/p0 models, ENGINE_SATURATION_PRESSURE_PA
    engine: tuple[tuple[float, ...], np.ndarray]
    # Henry limits (params, p0 in Pa or None, expected): expected None means
    # finite, checked against the slope at a tiny pressure; inf or 0.0 where
    # the slope diverges or vanishes
    henry: tuple[tuple[tuple[float, ...], float | None, float | None], ...] = ()
    # (params, saturation capacity in mol/kg) where the model declares one
    capacity: tuple[tuple[float, ...], float] | None = None
    through_origin: bool = True
    # smallest x the sampler's data may use, from the params (Temkin needs a_t p > 1)
    x_floor: Callable[[np.ndarray], np.ndarray] = field(default=lambda params: 0.0)


# --- the published equations, written independently in scalar math ----------
def henry_eq(p, t, k_h):  # Henry 1803: amount taken up proportional to pressure
    return k_h * p


def langmuir_eq(p, t, q_sat, b):  # Langmuir, JACS 40 (1918) 1361, eq. for one site type
    return q_sat * b * p / (1 + b * p)


def dsl_eq(p, t, q1, b1, q2, b2):  # Langmuir 1918, several kinds of site: sum of terms
    return langmuir_eq(p, t, q1, b1) + langmuir_eq(p, t, q2, b2)


def freundlich_eq(p, t, k_f, n):  # Freundlich, Z. Phys. Chem. 57 (1906) 385 (from memory)
    return k_f * p ** (1 / n)


def sips_eq(p, t, q_sat, b, s):  # Sips, J. Chem. Phys. 16 (1948) 490
    return q_sat * (b * p) ** s / (1 + (b * p) ** s)


def toth_eq(p, t, q_sat, b, tt):  # Toth, Acta Chim. Acad. Sci. Hung. 69 (1971) 311
    return q_sat * b * p / (1 + (b * p) ** tt) ** (1 / tt)


def rp_eq(p, t, k, a, beta):  # Redlich & Peterson, J. Phys. Chem. 63 (1959) 1024
    return k * p / (1 + a * p**beta)


def temkin_eq(p, t, a_t, b_t):  # Temkin & Pyzhev 1940 (from memory): q = RT/b ln(a p)
    return R * t / b_t * math.log(a_t * p)


def bet_eq(x, t, n_m, c):  # Brunauer, Emmett & Teller, JACS 60 (1938) 309, eq. (28)
    # (equation number from memory)
    return n_m * c * x / ((1 - x) * (1 - x + c * x))


def gab_eq(x, t, n_m, c, k):  # Anderson, JACS 68 (1946) 686 form of GAB (from memory)
    return n_m * c * k * x / ((1 - k * x) * (1 - k * x + c * k * x))


def dr_eq(x, t, q_m, e):  # Dubinin & Radushkevich 1947 (from memory)
    return q_m * math.exp(-((R * t * math.log(1 / x) / e) ** 2))


def da_eq(x, t, q_m, e, n):  # Dubinin & Astakhov, Adv. Chem. Ser. 102 (1971) 69 (from memory)
    return q_m * math.exp(-((R * t * math.log(1 / x) / e) ** n))


def jovanovic_eq(p, t, q_sat, b):  # Jovanovic, Kolloid-Z. Z. Polym. 235 (1969) 1203
    # q = q_sat (1 - e^-bp); 1 - e^-bp written as -expm1(-bp), which keeps its
    # digits at small bp where 1 - exp(-bp) loses them
    return q_sat * -math.expm1(-b * p)


_P0 = ENGINE_SATURATION_PRESSURE_PA

# In catalogue order: tests/worker/test_models.py checks the table against the catalogue.
CASES: tuple[ModelCase, ...] = (
    ModelCase("henry", ("k_h",), henry_eq,
              ((298.15, (1e-5,)), (298.15, (3e-7,)), (273.15, (2e-3,))),
              lambda r: (_lu(r, 1e-8, 1e-2),),
              engine=((3.0e-5,), np.geomspace(1e2, 1e5, 20)),
              henry=(((4e-6,), None, None),)),
    ModelCase("langmuir", ("q_sat", "affinity"), langmuir_eq,
              ((298.15, (3.0, 1e-5)), (298.15, (8.0, 2e-4)), (298.15, (1.5, 3e-7))),
              lambda r: (_u(r, 0.1, 20), _lu(r, 1e-7, 1e-2)),
              engine=((5.0, 2.0e-5), np.geomspace(1e2, 1e6, 25)),
              henry=(((3.0, 2e-5), None, None),),
              capacity=((3.0, 2e-5), 3.0)),
    ModelCase("dual_site_langmuir", ("q_sat_1", "affinity_1", "q_sat_2", "affinity_2"), dsl_eq,
              ((298.15, (2.0, 1e-3, 5.0, 1e-5)), (298.15, (1.0, 5e-4, 3.0, 2e-6)),
               (298.15, (0.5, 1e-2, 4.0, 1e-4)), (298.15, (3.0, 1e-4, 3.0, 1e-5))),
              lambda r: (_u(r, 0.1, 10), _lu(r, 1e-5, 1e-2), _u(r, 0.1, 10), _lu(r, 1e-7, 1e-5)),
              engine=((2.0, 1.0e-3, 4.0, 1.0e-5), np.geomspace(1e1, 1e7, 40)),
              henry=(((1.0, 1e-3, 4.0, 1e-5), None, None),),
              capacity=((1.0, 1e-3, 4.0, 1e-5), 5.0)),
    ModelCase("freundlich", ("k_f", "n"), freundlich_eq,
              ((298.15, (1e-3, 2.0)), (298.15, (5e-2, 4.0)), (298.15, (1e-6, 0.8))),
              lambda r: (_lu(r, 1e-5, 1e-1), _u(r, 0.5, 6)),
              engine=((0.02, 2.5), np.geomspace(1e2, 1e6, 25)),
              henry=(((2e-4, 1.0), None, None), ((2e-4, 2.0), None, np.inf),
                     ((2e-4, 0.7), None, 0.0))),
    ModelCase("sips", ("q_sat", "affinity", "heterogeneity"), sips_eq,
              ((298.15, (5.0, 1e-5, 0.7)), (298.15, (3.0, 1e-4, 1.3)), (298.15, (8.0, 2e-6, 0.5))),
              lambda r: (_u(r, 0.5, 15), _lu(r, 1e-7, 1e-3), _u(r, 0.2, 3)),
              engine=((6.0, 1.0e-5, 0.7), np.geomspace(1e2, 1e7, 30)),
              henry=(((5.0, 1e-4, 1.0), None, None), ((5.0, 1e-4, 0.6), None, np.inf),
                     ((5.0, 1e-4, 1.4), None, 0.0)),
              capacity=((5.0, 1e-4, 0.6), 5.0)),
    ModelCase("toth", ("q_sat", "affinity", "t"), toth_eq,
              ((298.15, (5.0, 1e-5, 0.6)), (298.15, (3.0, 1e-4, 0.4)), (298.15, (4.0, 3e-5, 1.5)),
               (298.15, (10.0, 1e-3, 0.25))),
              lambda r: (_u(r, 0.5, 15), _lu(r, 1e-7, 1e-3), _u(r, 0.2, 3)),
              engine=((6.0, 1.0e-4, 0.6), np.geomspace(1e1, 1e7, 30)),
              henry=(((5.0, 1e-4, 0.3), None, None),),
              capacity=((5.0, 1e-4, 0.4), 5.0)),
    ModelCase("redlich_peterson", ("k_rp", "a_rp", "beta"), rp_eq,
              ((298.15, (1e-4, 1e-3, 0.8)), (298.15, (5e-5, 2e-5, 0.95)),
               (298.15, (2e-3, 0.05, 0.6))),
              lambda r: (_lu(r, 1e-6, 1e-2), _lu(r, 1e-6, 1e-1), _u(r, 0.3, 1.0)),
              engine=((2.0e-4, 1.0e-3, 0.8), np.geomspace(1e1, 1e6, 30)),
              henry=(((1e-4, 1e-3, 0.8), None, None),)),
    ModelCase("temkin", ("a_t", "b_t"), temkin_eq,
              ((298.15, (0.05, 2000.0)), (273.15, (1.0, 8000.0))),
              lambda r: (_lu(r, 0.02, 10), _lu(r, 500, 20000)),
              engine=((1.0e-2, 2.0e3), np.geomspace(1e3, 1e6, 25)),
              through_origin=False,
              # the Temkin form needs a_t p > 1 to describe uptake
              x_floor=lambda params: 2.0 / params[:, :1]),
    ModelCase("bet", ("n_m", "c"), bet_eq,
              ((77.35, (2.0, 100.0)), (77.35, (5.0, 10.0)), (77.35, (1.0, 1000.0))),
              lambda r: (_u(r, 0.5, 20), _lu(r, 1, 1e3)),
              engine=((3.0, 100.0), _P0 * np.linspace(0.02, 0.45, 20)),
              henry=(((2.0, 100.0), 101325.0, None),)),
    ModelCase("gab", ("n_m", "c", "k"), gab_eq,
              ((298.15, (2.0, 50.0, 0.8)), (298.15, (1.0, 200.0, 0.6)),
               (298.15, (4.0, 10.0, 0.95))),
              lambda r: (_u(r, 0.5, 20), _lu(r, 1, 1e3), _u(r, 0.3, 0.99)),
              engine=((3.0, 50.0, 0.8), _P0 * np.linspace(0.02, 0.9, 25)),
              henry=(((2.0, 50.0, 0.8), 3169.0, None),)),
    ModelCase("dubinin_radushkevich", ("q_m", "e"), dr_eq,
              ((273.15, (5.0, 15000.0)), (77.35, (10.0, 6000.0)), (298.15, (2.0, 30000.0))),
              lambda r: (_u(r, 0.5, 20), _lu(r, 3e3, 4e4)),
              engine=((5.0, 1.5e4), _P0 * np.geomspace(1e-5, 0.9, 25)),
              henry=(((5.0, 15000.0), 1e5, 0.0),),
              capacity=((6.0, 12000.0), 6.0)),
    ModelCase("dubinin_astakhov", ("q_m", "e", "n"), da_eq,
              ((273.15, (5.0, 15000.0, 2.5)), (77.35, (8.0, 8000.0, 1.5)),
               (298.15, (3.0, 20000.0, 4.0))),
              lambda r: (_u(r, 0.5, 20), _lu(r, 3e3, 4e4), _u(r, 1.0, 5.0)),
              engine=((5.0, 1.5e4, 2.5), _P0 * np.geomspace(1e-5, 0.9, 25)),
              henry=(((5.0, 15000.0, 2.5), 1e5, 0.0), ((5.0, 15000.0, 0.8), 1e5, np.inf)),
              capacity=((6.0, 12000.0, 3.0), 6.0)),
    ModelCase("jovanovic", ("q_sat", "affinity"), jovanovic_eq,
              ((298.15, (3.0, 1e-5)), (298.15, (8.0, 2e-4)), (298.15, (1.5, 3e-7))),
              lambda r: (_u(r, 0.1, 20), _lu(r, 1e-7, 1e-2)),
              engine=((5.0, 2.0e-5), np.geomspace(1e2, 1e6, 25)),
              henry=(((3.0, 2e-5), None, None),),
              capacity=((3.0, 2e-5), 3.0)),
)

BY_ID: dict[str, ModelCase] = {case.model_id: case for case in CASES}
