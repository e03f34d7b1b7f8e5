"""Process simulators of our own for the calibration benchmark (made-up scenarios): two four-factor ones
and a three-factor one held out from all model development.

Neither was used to develop windowfinder's models: they exist to measure them on problems nobody tuned
on. Every factor has a tolerance, each study has a safety limit, and the coating study has one
logit-transformed and one log-transformed response. Runs carry measurement noise of a known kind and
size (:class:`windowfinder.cases.scenario.Noise`), so the true probability that a new run meets every
limit is known exactly (:meth:`benchmarks.problems.Problem.run_probability`).

* ``coating``: thermal cure of a catalysed coating. Conversion follows first-order kinetics with an
  Arrhenius rate (the film's own heating lag grows with its thickness); residual solvent leaves by
  diffusion, its time constant growing with the square of the film thickness (Crank, *The Mathematics of
  Diffusion*, 1975, ch. 4: plane sheet, first-term decay); the exotherm of the cure raises the film's
  peak temperature, a safety limit (solvent flash point / substrate damage). Constants are invented.
* ``bonding``: a structural adhesive lap joint. Bondline thickness falls with clamp pressure and as the
  adhesive thins on heating; lap-shear strength needs cure (Arrhenius in temperature and time), a
  prepared surface and a bondline neither starved nor thick (safety: structural strength); voids shrink
  with pressure and grow with the cure temperature (outgassing). Constants are invented.
* ``hardening`` (held out: written after the model changes it measures, never used to choose them):
  scan induction hardening of a steel shaft. The surface peak temperature rises with the heat input
  per unit length (power over the square root of scan speed: the moving-source scaling of Rosenthal's
  solution, from memory); the hardened case depth grows with the excess of the peak over the
  austenitising temperature (smoothly) and shrinks at high speed; surface hardness needs a severe
  enough quench (logistic in the quench flow) and falls when an overheated surface coarsens its grain;
  distortion grows with the hardened volume and the quench severity. Noise differs per response in
  size and kind. Constants are invented.
"""

from __future__ import annotations

import numpy as np

from windowfinder.cases.scenario import Noise
from windowfinder.inputs.spec import StudySpec

_R = 8.314  # J/(mol K)


def _arrhenius(temp_c, ea, t_ref_c):
    """Rate relative to the rate at ``t_ref_c``: ``exp(-Ea/R (1/T - 1/T_ref))``, temperatures in degC."""
    return np.exp(-ea / _R * (1.0 / (temp_c + 273.15) - 1.0 / (t_ref_c + 273.15)))


# -- coating cure ----------------------------------------------------------------------------------

COATING_NOISE = {
    "conversion": Noise("additive", 0.4, low=0.01, high=99.99),  # % of groups reacted, IR band ratio
    "residual_solvent": Noise("relative", 0.12, low=0.0),       # ppm by headspace GC
    "peak_temperature": Noise("additive", 1.5),                  # degC, thermocouple in the film
}


def coating_truth(X) -> dict:
    """Noise-free responses at natural settings ``(oven degC, time min, thickness um, catalyst %)``."""
    temp, time, thick, cat = X[:, 0], X[:, 1], X[:, 2], X[:, 3]
    lag = 2.0 * (thick / 50.0) ** 1.5                        # min before the film reaches oven temperature
    k = 0.09 * _arrhenius(temp, 65e3, 150.0) * (cat / 1.5) ** 0.8   # 1/min
    conversion = 98.5 * (1.0 - np.exp(-k * np.clip(time - lag, 0.0, None)))
    tau = 6.0 * (thick / 50.0) ** 2 / _arrhenius(temp, 35e3, 150.0)   # diffusion time constant, min
    residual = 4000.0 * (thick / 50.0) * np.exp(-time / tau) + 20.0
    peak = temp + 45.0 * (cat / 1.5) * (thick / 50.0) * (k / (k + 0.15))
    return {"conversion": conversion, "residual_solvent": residual, "peak_temperature": peak,
            "works": np.ones(len(X), bool)}


def coating_spec() -> StudySpec:
    return StudySpec.from_dict({
        "study": {"name": "coating cure (benchmark)", "confidence": 0.95, "seed": 0},
        "factor": [{"name": "oven_temperature", "low": 120.0, "high": 200.0, "tolerance": 2.0},
                   {"name": "cure_time", "low": 5.0, "high": 40.0, "tolerance": 0.5},
                   {"name": "film_thickness", "low": 20.0, "high": 80.0, "tolerance": 2.0},
                   {"name": "catalyst", "low": 0.5, "high": 3.0, "tolerance": 0.05}],
        "response": [{"name": "conversion", "goal": "maximize", "min": 95.0, "transform": "logit",
                      "bounds": [0.0, 100.0]},
                     {"name": "residual_solvent", "goal": "minimize", "max": 300.0, "transform": "log"},
                     {"name": "peak_temperature", "goal": "none", "max": 210.0, "kind": "safety"}]},
        source="benchmark coating")


# -- adhesive bonding ------------------------------------------------------------------------------

BONDING_NOISE = {
    "bondline": Noise("additive", 4.0, low=0.0),         # um, micrometer across the joint
    "lap_shear": Noise("additive", 0.9),                 # MPa, tensile test scatter
    "voids": Noise("relative", 0.15, low=0.0),           # % area, ultrasonic C-scan
}


def bonding_truth(X) -> dict:
    """Noise-free responses at natural settings ``(pressure MPa, temperature degC, time min, plasma %)``."""
    press, temp, time, plasma = X[:, 0], X[:, 1], X[:, 2], X[:, 3]
    viscosity = _arrhenius(temp, -30e3, 100.0)            # relative viscosity, falls on heating
    bondline = 40.0 + 160.0 * (viscosity / (1.0 + 4.0 * press)) ** 0.6
    cure = 1.0 - np.exp(-0.05 * time * _arrhenius(temp, 55e3, 100.0))
    prepared = 0.55 + 0.45 * (1.0 - np.exp(-plasma / 30.0))
    starved = np.exp(-((bondline - 40.0) / 25.0) ** 2)   # too thin a line tears
    thick = np.clip((bondline - 160.0) / 100.0, 0.0, None)
    lap_shear = 32.0 * cure * prepared * (1.0 - 0.5 * starved) * (1.0 - thick)
    voids = 1.2 * _arrhenius(temp, 25e3, 100.0) / (0.3 + press) * (1.0 + 0.2 * plasma / 100.0)
    return {"bondline": bondline, "lap_shear": lap_shear, "voids": voids, "works": np.ones(len(X), bool)}


def bonding_spec() -> StudySpec:
    return StudySpec.from_dict({
        "study": {"name": "adhesive bonding (benchmark)", "confidence": 0.95, "seed": 0},
        "factor": [{"name": "pressure", "low": 0.1, "high": 1.0, "tolerance": 0.02},
                   {"name": "temperature", "low": 60.0, "high": 140.0, "tolerance": 2.0},
                   {"name": "time", "low": 10.0, "high": 120.0, "tolerance": 2.0},
                   {"name": "plasma", "low": 0.0, "high": 100.0, "tolerance": 3.0}],
        "response": [{"name": "bondline", "goal": "none", "min": 60.0, "max": 150.0},
                     {"name": "lap_shear", "goal": "maximize", "min": 20.0, "kind": "safety"},
                     {"name": "voids", "goal": "minimize", "max": 2.0, "transform": "log"}]},
        source="benchmark bonding")


# -- induction hardening (held out) ------------------------------------------------------------------

HARDENING_NOISE = {
    "case_depth": Noise("additive", 0.07, low=0.0),       # mm, etched section
    "surface_hardness": Noise("additive", 1.1),           # HRC, Rockwell tester scatter
    "distortion": Noise("relative", 0.12, low=0.0),       # um run-out, dial gauge on centres
}


def hardening_truth(X) -> dict:
    """Noise-free responses at natural settings ``(power kW, scan speed mm/s, quench flow L/min)``."""
    power, speed, flow = X[:, 0], X[:, 1], X[:, 2]
    peak = 640.0 + 13.0 * power / np.sqrt(speed)                     # degC at the surface
    excess = 55.0 * np.logaddexp(0.0, (peak - 830.0) / 55.0)         # smooth excess over Ac3
    depth = 3.4 * (1.0 - np.exp(-excess / 380.0)) * (6.0 / speed) ** 0.12
    quench = 1.0 / (1.0 + np.exp(-(flow - 20.0) / 5.0))
    coarse = 7.0 / (1.0 + np.exp(-(peak - 1180.0) / 45.0))
    hardness = 41.0 + 21.0 * quench - coarse
    distortion = 9.0 + 16.0 * depth ** 1.6 * (flow / 30.0) ** 0.45
    return {"case_depth": depth, "surface_hardness": hardness, "distortion": distortion,
            "works": np.ones(len(X), bool)}


def hardening_spec() -> StudySpec:
    return StudySpec.from_dict({
        "study": {"name": "induction hardening (benchmark, held out)", "confidence": 0.95, "seed": 0},
        "factor": [{"name": "power", "low": 40.0, "high": 120.0, "tolerance": 1.0},
                   {"name": "scan_speed", "low": 3.0, "high": 15.0, "tolerance": 0.2},
                   {"name": "quench_flow", "low": 8.0, "high": 60.0, "tolerance": 1.5}],
        "response": [{"name": "case_depth", "goal": "none", "min": 1.2, "max": 2.8, "kind": "safety"},
                     {"name": "surface_hardness", "goal": "maximize", "min": 54.0},
                     {"name": "distortion", "goal": "minimize", "max": 80.0, "transform": "log"}]},
        source="benchmark hardening")


def noisy_run(truth_fn, noise, factor_names):
    """``run(settings, seed)``: the truth at one setting plus one draw of each response's noise."""
    def run(settings, seed):
        x = np.array([[float(settings[f]) for f in factor_names]])
        t = truth_fn(x)
        rng = np.random.default_rng(seed)
        return {r: noise[r].draw(float(t[r][0]), rng) for r in noise}
    return run


PROCESSES = {"coating": ("cure of a catalysed coating, 4 factors (own simulator, noisy runs)",
                         coating_spec, coating_truth, COATING_NOISE),
             "bonding": ("structural adhesive bonding, 4 factors (own simulator, noisy runs)",
                         bonding_spec, bonding_truth, BONDING_NOISE),
             "hardening": ("scan induction hardening, 3 factors (own simulator, noisy runs; held out)",
                           hardening_spec, hardening_truth, HARDENING_NOISE)}
