"""Laser cutting of 4 mm steel with nitrogen or oxygen assist gas (made-up demo scenario).

Physics
-------
What the cut sees of the beam is summarised by the line energy, the energy put into each metre of cut,

    E = 60 * P / v      (kJ/m, with power P in kW and speed v in m/min)

(common practice, no source). Cutting through the sheet needs a line energy ``E_REQ`` that depends on the
gas: with oxygen part of the iron burns and adds heat, so less laser energy is needed than with inert
nitrogen, which only blows out the melt. With ``r = E / E_REQ`` the energy ratio:

* ``r < R_SEPARATE``: the cut does not separate: the run fails (nothing to measure);
* dross (melt left on the bottom edge) is large near the threshold and falls off exponentially as the
  ratio rises; with too much energy the melt pool grows again and dross comes back (sooner with oxygen,
  whose oxide slag is sticky);
* the roughness depth of the cut face grows with the logarithm of the ratio, more steeply with oxygen;
* the heat-affected zone grows as the square root of the line energy (heat conducted sideways while the
  beam passes, a diffusion length), wider with oxygen because the burning adds heat.

Every constant is invented for the demo; the shapes are what the trade describes qualitatively.
"""

from __future__ import annotations

import pathlib

import numpy as np

from windowfinder.cases.scenario import Noise, Scenario

FACTORS = ["power", "speed", "gas"]  # kW, m/min, level
RESPONSES = ["dross", "roughness", "haz_width"]  # um, um, mm
LEVELS = {"gas": ("nitrogen", "oxygen")}

#: line energy needed to cut through, kJ/m, per gas (nitrogen, oxygen)
E_REQ = np.array([55.0, 30.0])
#: below this energy ratio the cut does not separate
R_SEPARATE = 0.85
#: dross near the threshold (um) and its fall-off with the energy ratio
DROSS_0, DROSS_FALL = 60.0, 2.5
#: energy ratio beyond which dross grows again, and how fast (um per unit ratio squared), per gas
R_HOT = np.array([5.0, 3.5])
DROSS_HOT = np.array([8.0, 25.0])
#: roughness depth Rz (um) at the threshold and its growth per unit of ln(ratio), per gas
RZ_0, RZ_SLOPE = np.array([8.0, 13.0]), np.array([7.0, 9.0])
#: width of the heat-affected zone (mm) at a line energy of 100 kJ/m, per gas
HAZ_100 = np.array([0.30, 0.33])

NOISE = {
    "dross": Noise("relative", 0.12, low=0.0),        # bottom-edge gauge, about 12 % relative
    "roughness": Noise("additive", 1.0, low=0.0),     # profilometer, +-1 um
    "haz_width": Noise("additive", 0.015, low=0.0),   # etched cross-section, +-0.015 mm
}


def line_energy(power, speed):
    """Line energy in kJ/m from power (kW) and speed (m/min)."""
    return 60.0 * np.asarray(power, dtype=float) / np.asarray(speed, dtype=float)


def _simulate(X, rng=None):
    g = np.asarray(X[:, 2], dtype=float).round().astype(int)
    E = line_energy(X[:, 0], X[:, 1])
    r = E / E_REQ[g]
    dross = DROSS_0 * np.exp(-DROSS_FALL * (r - 1.0)) + DROSS_HOT[g] * np.maximum(r - R_HOT[g], 0.0) ** 2
    rough = RZ_0[g] + RZ_SLOPE[g] * np.log(np.maximum(r, 1e-9))
    haz = HAZ_100[g] * np.sqrt(E / 100.0)
    return {"dross": dross, "roughness": rough, "haz_width": haz, "works": r >= R_SEPARATE}


_SCENARIO = Scenario(pathlib.Path(__file__).parent, FACTORS, RESPONSES, _simulate, NOISE,
                     failure_reason="the cut did not separate")
truth, evaluate, feasible = _SCENARIO.truth, _SCENARIO.evaluate, _SCENARIO.feasible
LIMITS, BOUNDS = _SCENARIO.limits, _SCENARIO.bounds
