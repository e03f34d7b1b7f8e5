"""Resistance spot welding of two 1.0 mm low-carbon steel sheets (made-up demo scenario).

Physics (deliberately simple, lumped over the weld time)
-------------------------------------------------------
* Heat: Joule's first law, Q = I^2 R t, with the stack resistance R taken constant over the weld time.
* Resistance: bulk part plus a contact part that falls with electrode force as F^(-1/2), Holm's
  constriction resistance R_c = rho / (2 a) for a contact spot of radius a with a = sqrt(F / (pi H))
  under plastic contact (R. Holm, Electric Contacts: Theory and Application, 4th ed. 1967).
* Loss: the water-cooled electrodes and the surrounding sheet draw a steady power P_loss, so the heat
  left for the weld is Q_eff = (I^2 R - P_loss) t.
* Nugget: none below the heat Q0 needed to start melting at the faying surface; above it the diameter
  grows towards the electrode-face limit, d = D_SAT (1 - exp(-(Q_eff - Q0) / QS)).
* Expulsion: when Q_eff exceeds what the electrode force can contain, Q_EXP (F / F_REF)^0.7, molten
  metal is ejected and the weld is scrap: a failed run. The threshold scatters from run to run (surface
  condition, electrode wear), so runs near the edge fail at random; ``truth`` uses its nominal value.
  Together the nugget onset and expulsion give the familiar lobe: both limiting currents fall with
  weld time.
* Indentation: electrode sinking into the softened sheet, grows with force and heat, in % of the sheet
  thickness.
* Tensile-shear strength for pull-out failure: F_ts = pi d t_s UTS (1 - indentation), i.e. the weld
  circumference times the remaining sheet thickness times the sheet's tensile strength (the pull-out
  load estimate is from memory; the indentation factor is a demo assumption).

All constants are invented to give a plausible lobe; they are not data for any real steel or machine.
"""

from __future__ import annotations

import pathlib

import numpy as np

from windowfinder.cases.scenario import Noise, Scenario

FACTORS = ["current", "weld_time", "force"]  # kA, ms, kN
RESPONSES = ["nugget_diameter", "indentation", "shear_strength"]  # mm, %, kN

#: bulk resistance of the sheet stack and contact resistance at F_REF, ohm
R_BULK, R_CONTACT = 80e-6, 50e-6
#: reference electrode force, kN
F_REF = 3.0
#: steady heat loss to the electrodes and surrounding sheet, W
P_LOSS = 5000.0
#: nugget onset heat and growth scale, J; saturation diameter (about the electrode face), mm
Q0, QS, D_SAT = 300.0, 600.0, 7.0
#: nominal expulsion heat at F_REF (J), its force exponent, run-to-run relative scatter (log sd)
Q_EXP, EXP_FORCE_EXPONENT, EXP_SCATTER = 1500.0, 0.7, 0.04
#: indentation at no heat (%), growth per kJ at F_REF (%), force exponent
IND_BASE, IND_PER_KJ, IND_FORCE_EXPONENT = 5.0, 8.0, 0.8
#: sheet thickness (mm) and tensile strength (MPa)
SHEET, UTS = 1.0, 340.0

NOISE = {
    "nugget_diameter": Noise("additive", 0.15, low=0.0),  # peel test, caliper reading
    "indentation": Noise("additive", 0.8, low=0.0),       # depth gauge, % of thickness
    "shear_strength": Noise("relative", 0.04, low=0.0),   # tensile-shear test scatter
}


def resistance(force):
    """Stack resistance (ohm) at electrode ``force`` (kN): bulk + Holm contact part ~ F^(-1/2)."""
    return R_BULK + R_CONTACT * np.sqrt(F_REF / np.asarray(force, dtype=float))


def joule_heat(current, weld_time, force):
    """Joule heat Q = I^2 R t in J, for ``current`` in kA, ``weld_time`` in ms, ``force`` in kN."""
    current = np.asarray(current, dtype=float) * 1e3
    return current**2 * resistance(force) * np.asarray(weld_time, dtype=float) * 1e-3


def _simulate(X, rng=None):
    current, weld_time, force = X[:, 0], X[:, 1], X[:, 2]
    q_eff = joule_heat(current, weld_time, force) - P_LOSS * weld_time * 1e-3
    d = np.where(q_eff > Q0, D_SAT * -np.expm1(-(q_eff - Q0) / QS), 0.0)
    indentation = IND_BASE + IND_PER_KJ * (force / F_REF) ** IND_FORCE_EXPONENT * np.maximum(q_eff, 0) / 1e3
    strength = np.pi * d * SHEET * UTS * (1.0 - indentation / 100.0) / 1e3
    threshold = Q_EXP * (force / F_REF) ** EXP_FORCE_EXPONENT
    if rng is not None:
        threshold = threshold * np.exp(EXP_SCATTER * rng.standard_normal(len(X)))
    return {"nugget_diameter": d, "indentation": indentation, "shear_strength": strength,
            "works": q_eff <= threshold}


_SCENARIO = Scenario(pathlib.Path(__file__).parent, FACTORS, RESPONSES, _simulate, NOISE,
                     failure_reason="expulsion: molten metal ejected from the weld, no usable joint")
truth, evaluate, feasible = _SCENARIO.truth, _SCENARIO.evaluate, _SCENARIO.feasible
LIMITS, BOUNDS = _SCENARIO.limits, _SCENARIO.bounds
