"""Batch reactor with consecutive first-order reactions A -> B -> C (made-up demo scenario).

Physics
-------
Both steps are first order in the reacting species, catalysed, with Arrhenius temperature dependence
(Arrhenius law, k = A exp(-Ea / (R T))):

    k1 = A1 * c**N1 * exp(-E1 / (R T)),    k2 = A2 * c**N2 * exp(-E2 / (R T))

with catalyst loading ``c`` in mol%. The over-reaction B -> C has the higher activation energy (it gains
on the wanted step as the temperature rises) and a lower order in catalyst (more catalyst favours B).
For an isothermal batch the closed form (Levenspiel, Chemical Reaction Engineering, 3rd ed. 1999, ch. 8,
consecutive first-order reactions) is

    C_A / C_A0 = exp(-k1 t)
    C_B / C_A0 = k1 / (k2 - k1) * (exp(-k1 t) - exp(-k2 t))
    C_C / C_A0 = 1 - C_A / C_A0 - C_B / C_A0

evaluated here in a form that stays exact when k1 = k2.

Safety response: the heat released over the batch, as adiabatic temperature rise,

    dT_ad = C_A0 * ((-dH1) * X_A + (-dH2) * Y_C) / (rho * cp)

where X_A is the conversion of A and Y_C the fraction of A that went on to C (B converted). It is the
rise the batch would see if the heat released during the hold were not removed, i.e. the cooling duty per
batch in kelvin, which the vessel's cooling and emergency quench are sized against. The strongly
exothermic over-reaction dominates it once A is used up. We do not use the full potential at charging:
in a batch process that is the same for every setting and cannot tell settings apart. A real assessment
also looks at the material accumulated when cooling fails (MTSR); that is beyond this demo.
"""

from __future__ import annotations

import pathlib

import numpy as np

from windowfinder.cases.scenario import Noise, Scenario

FACTORS = ["temperature", "time", "catalyst"]  # degC, min, mol%
RESPONSES = ["yield_B", "impurity_C", "adiabatic_rise"]  # %, %, K

#: molar gas constant, J/(mol K) (CODATA 2018 exact value)
GAS_CONSTANT = 8.314462618
#: activation energies, J/mol
E1, E2 = 60.0e3, 95.0e3
#: pre-exponential factors, 1/min per (mol%)**N
A1, A2 = 1.9e7, 7.3e10
#: reaction orders in catalyst loading
N1, N2 = 1.0, 0.5
#: heats of reaction, J/mol (exothermic)
DH1, DH2 = -57.0e3, -171.0e3
#: initial concentration of A (mol/m3), density (kg/m3), heat capacity (J/(kg K)) of the batch
C_A0, RHO, CP = 1200.0, 900.0, 1900.0

NOISE = {
    "yield_B": Noise("additive", 1.0, low=0.0, high=100.0),   # HPLC assay, +-1 % absolute
    "impurity_C": Noise("relative", 0.05, low=0.0, high=100.0),  # 5 % relative at low levels
    "adiabatic_rise": Noise("additive", 0.8),                  # reaction calorimetry, +-0.8 K
}


def rate_constants(temperature, catalyst):
    """Rate constants (k1, k2) in 1/min at ``temperature`` (degC) and ``catalyst`` loading (mol%).

    Arrhenius law with a power-law catalyst dependence; broadcasts over arrays.
    """
    T = np.asarray(temperature, dtype=float) + 273.15
    c = np.asarray(catalyst, dtype=float)
    k1 = A1 * c**N1 * np.exp(-E1 / (GAS_CONSTANT * T))
    k2 = A2 * c**N2 * np.exp(-E2 / (GAS_CONSTANT * T))
    return k1, k2


def fractions(k1, k2, t):
    """Fractions of the initial A present as A, B and C after time ``t`` (same time unit as 1/k).

    Levenspiel (1999), ch. 8 closed form, written as
    ``k1 t exp(-k1 t) * (1 - exp(-(k2 - k1) t)) / ((k2 - k1) t)`` so that k1 = k2 is exact.
    """
    k1, k2, t = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (k1, k2, t)))
    a = np.exp(-k1 * t)
    x = (k2 - k1) * t
    small = np.abs(x) < 1e-8
    ratio = np.where(small, 1.0 - x / 2.0, -np.expm1(-x) / np.where(small, 1.0, x))
    b = k1 * t * a * ratio
    return a, b, 1.0 - a - b


def adiabatic_rise(conversion_A, fraction_C):
    """Heat released as adiabatic temperature rise (K), from the converted A and the B gone on to C."""
    return C_A0 * (-DH1 * np.asarray(conversion_A) + -DH2 * np.asarray(fraction_C)) / (RHO * CP)


def _simulate(X, rng=None):
    k1, k2 = rate_constants(X[:, 0], X[:, 2])
    a, b, c = fractions(k1, k2, X[:, 1])
    return {"yield_B": 100.0 * b, "impurity_C": 100.0 * c, "adiabatic_rise": adiabatic_rise(1.0 - a, c),
            "works": np.ones(len(X), dtype=bool)}


_SCENARIO = Scenario(pathlib.Path(__file__).parent, FACTORS, RESPONSES, _simulate, NOISE)
truth, evaluate, feasible = _SCENARIO.truth, _SCENARIO.evaluate, _SCENARIO.feasible
LIMITS, BOUNDS = _SCENARIO.limits, _SCENARIO.bounds
