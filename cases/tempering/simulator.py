"""Tempering of a quenched medium-carbon alloy steel part (made-up demo scenario).

Physics
-------
* Hardness follows the Hollomon-Jaffe tempering parameter (J. H. Hollomon and L. D. Jaffe,
  "Time-temperature relations in tempering steel", Trans. AIME 162, 1945, 223-249):

      P = T (C + log10 t),   T in K, t in h,

  so any two treatments with the same P give the same hardness. C = 20 is the constant commonly used for
  carbon and low-alloy steels (common practice, no source). Over the range of this demo the hardness
  falls linearly with P: HRC = H0 - H1 * P / 1000 (invented coefficients, plausible for a 0.4 % C steel).
* Impact energy (Charpy V-notch) rises as the steel softens (a logistic curve in P) but drops where the
  part is held in the temper-embrittlement range around 500 degC; the loss grows with the hold time. The
  shape and the numbers are demo assumptions, not data for any grade.
"""

from __future__ import annotations

import pathlib

import numpy as np

from windowfinder.cases.scenario import Noise, Scenario

FACTORS = ["temperature", "time"]  # degC, h
RESPONSES = ["hardness", "impact_energy"]  # HRC, J

#: Hollomon-Jaffe constant for t in hours (common practice, no source)
HJ_CONSTANT = 20.0
#: hardness line HRC = H0 - H1 * P / 1000
H0, H1 = 102.0, 4.3
#: impact energy: floor (J), rise (J), mid-point and width of the rise in P
KV_FLOOR, KV_RISE, KV_MID, KV_WIDTH = 15.0, 90.0, 15500.0, 900.0
#: temper embrittlement: depth (J), centre (degC), width (K), time constant (h)
EMB_DEPTH, EMB_CENTRE, EMB_WIDTH, EMB_TIME = 30.0, 500.0, 50.0, 2.0

NOISE = {
    "hardness": Noise("additive", 0.7),                 # Rockwell C, several indents averaged
    "impact_energy": Noise("relative", 0.10, low=0.0),  # Charpy scatter, mean of three specimens
}


def tempering_parameter(temperature, time):
    """Hollomon-Jaffe parameter P = T (C + log10 t) for ``temperature`` in degC and ``time`` in h."""
    return (np.asarray(temperature, dtype=float) + 273.15) * (HJ_CONSTANT + np.log10(time))


def _simulate(X, rng=None):
    temperature, time = X[:, 0], X[:, 1]
    p = tempering_parameter(temperature, time)
    hardness = H0 - H1 * p / 1e3
    embrittlement = (EMB_DEPTH * np.exp(-(((temperature - EMB_CENTRE) / EMB_WIDTH) ** 2))
                     * -np.expm1(-time / EMB_TIME))
    impact = KV_FLOOR + KV_RISE / (1.0 + np.exp(-(p - KV_MID) / KV_WIDTH)) - embrittlement
    return {"hardness": hardness, "impact_energy": impact, "works": np.ones(len(X), dtype=bool)}


_SCENARIO = Scenario(pathlib.Path(__file__).parent, FACTORS, RESPONSES, _simulate, NOISE)
truth, evaluate, feasible = _SCENARIO.truth, _SCENARIO.evaluate, _SCENARIO.feasible
LIMITS, BOUNDS = _SCENARIO.limits, _SCENARIO.bounds
