"""Checks of the bundled demo cases: their physics against published laws, their noise, their files."""

from __future__ import annotations

import tomllib

import numpy as np
import pytest
from scipy import constants, stats
from scipy.integrate import solve_ivp

from windowfinder.cases import CASES, RunFailed, case_dir, list_cases, load_simulator
from windowfinder.errors import InputError

# An interior setting per case, away from every clipping bound of the noise, where the process works.
INTERIOR = {
    "reactor": {"temperature": 85.0, "time": 60.0, "catalyst": 1.5},
    "spotweld": {"current": 9.0, "weld_time": 200.0, "force": 3.0},
    "tempering": {"temperature": 540.0, "time": 2.0},
    "lasercut": {"power": 4.5, "speed": 3.0, "gas": "oxygen"},
}


@pytest.fixture(scope="module")
def reactor():
    return load_simulator("reactor")


@pytest.fixture(scope="module")
def spotweld():
    return load_simulator("spotweld")


@pytest.fixture(scope="module")
def tempering():
    return load_simulator("tempering")


def grid(bounds, n):
    """Full factorial grid with ``n`` levels per factor over ``bounds`` (d, 2)."""
    axes = [np.linspace(lo, hi, n) for lo, hi in bounds]
    return np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, len(axes))


# --------------------------------------------------------------------------------------------- registry
def test_listing_matches_the_case_folders():
    folders = sorted(p.name for p in case_dir(CASES[0]).parent.iterdir() if (p / "study.toml").is_file())
    assert sorted(list_cases()) == folders
    assert len(folders) >= 2


def test_unknown_case_is_a_one_line_input_error():
    with pytest.raises(InputError, match="no such bundled case"):
        case_dir("nonexistent")
    with pytest.raises(InputError):
        load_simulator("../reactor")


# --------------------------------------------------------------------------------------- study files
# Key sets of the study.toml contract in docs (DESIGN.md, "File contracts").
STUDY_KEYS = {"name", "confidence", "seed"}
FACTOR_KEYS = {"name", "unit", "low", "high", "step", "tolerance"}
CATEGORICAL_KEYS = {"name", "levels"}
RESPONSE_KEYS = {"name", "unit", "goal", "target", "min", "max", "kind", "transform", "bounds"}


@pytest.mark.parametrize("name", CASES)
def test_study_file_follows_the_contract(name):
    with open(case_dir(name) / "study.toml", "rb") as fh:
        study = tomllib.load(fh)
    assert {"study", "factor", "response"} <= set(study) <= {"study", "factor", "response", "constraint"}
    assert set(study["study"]) == STUDY_KEYS
    assert 0.5 < study["study"]["confidence"] < 1
    for f in study["factor"]:
        if "levels" in f:   # a categorical factor: named levels, no range
            assert set(f) == CATEGORICAL_KEYS and len(set(f["levels"])) == len(f["levels"]) >= 2
            continue
        assert {"name", "unit", "low", "high"} <= set(f) <= FACTOR_KEYS
        assert f["low"] < f["high"]
    for r in study["response"]:
        assert {"name", "unit", "goal", "kind", "transform"} <= set(r) <= RESPONSE_KEYS
        assert r["goal"] in {"maximize", "minimize", "target", "none"}
        assert r["kind"] in {"quality", "safety"}
        assert r["transform"] in {"none", "log", "logit"}
        assert ("target" in r) == (r["goal"] == "target")
        assert "min" in r or "max" in r, "every demo response carries a limit"
    assert any(r["kind"] == "safety" for r in study["response"])
    sim = load_simulator(name)
    assert sim.FACTORS == [f["name"] for f in study["factor"]]
    assert sim.RESPONSES == [r["name"] for r in study["response"]]


@pytest.mark.parametrize("name", CASES)
def test_readme_states_demo_status_and_cautions(name):
    text = (case_dir(name) / "README.md").read_text(encoding="utf-8").lower()
    for phrase in ("made-up demo scenario", "not a safety assessment", "review", "verification",
                   "qualified, licensed engineer"):
        assert phrase in text, f"{name}/README.md lacks '{phrase}'"


# ---------------------------------------------------------------------------------- reactor physics
def integrate_batch(k1, k2, t_end):
    """Numerical integration of dA/dt = -k1 A, dB/dt = k1 A - k2 B, dC/dt = k2 B from (1, 0, 0)."""
    sol = solve_ivp(lambda _t, y: [-k1 * y[0], k1 * y[0] - k2 * y[1], k2 * y[1]], (0.0, t_end),
                    [1.0, 0.0, 0.0], method="LSODA", rtol=1e-10, atol=1e-13)
    return sol.y[:, -1]


@pytest.mark.parametrize("setting", [(60.0, 240.0, 0.5), (85.0, 60.0, 1.5), (110.0, 10.0, 3.0),
                                     (72.5, 150.0, 2.2), (100.0, 200.0, 0.8)])
def test_reactor_matches_numerical_integration(reactor, setting):
    # Reference: independent numerical integration (scipy.integrate.solve_ivp) of the rate equations of
    # consecutive first-order reactions, Levenspiel, Chemical Reaction Engineering, 3rd ed. 1999, ch. 8.
    temperature, time, catalyst = setting
    k1, k2 = reactor.rate_constants(temperature, catalyst)
    a, b, c = integrate_batch(float(k1), float(k2), time)
    out = reactor.truth(np.array([setting]))
    np.testing.assert_allclose(out["yield_B"][0], 100 * b, rtol=1e-3)
    np.testing.assert_allclose(out["impurity_C"][0], 100 * c, rtol=1e-3)


def test_equal_rate_constants_case_matches_integration(reactor):
    # Reference: numerical integration as above; with k1 = k2 the closed form's limit is k t exp(-k t)
    # (Levenspiel 1999, ch. 8), which the simulator must handle without dividing by zero.
    a, b, c = reactor.fractions(0.03, 0.03, np.array([20.0, 70.0]))
    for i, t in enumerate((20.0, 70.0)):
        np.testing.assert_allclose([a[i], b[i], c[i]], integrate_batch(0.03, 0.03, t), rtol=1e-3)


@pytest.mark.parametrize("temperature,catalyst", [(70.0, 1.0), (95.0, 2.5)])
def test_reactor_yield_peaks_at_levenspiel_optimum(reactor, temperature, catalyst):
    # Reference: Levenspiel 1999, ch. 8: t* = ln(k2/k1) / (k2 - k1) and
    # C_Bmax / C_A0 = (k1/k2)^(k2/(k2-k1)); found here by brute force over a fine time grid.
    k1, k2 = (float(k) for k in reactor.rate_constants(temperature, catalyst))
    t_star = np.log(k2 / k1) / (k2 - k1)
    b_max = (k1 / k2) ** (k2 / (k2 - k1))
    times = np.linspace(0.0, 4.0 * t_star, 40001)
    X = np.column_stack([np.full_like(times, temperature), times, np.full_like(times, catalyst)])
    y = reactor.truth(X)["yield_B"]
    i = int(np.argmax(y))
    assert abs(times[i] - t_star) <= 1e-3 * t_star
    np.testing.assert_allclose(y[i] / 100.0, b_max, rtol=1e-3)


def test_rate_constants_follow_arrhenius(reactor):
    # Reference: Arrhenius law, k(T2)/k(T1) = exp(-Ea/R (1/T2 - 1/T1)); R from scipy.constants (CODATA).
    T1, T2, catalyst = 60.0, 110.0, 1.7
    k1_lo, k2_lo = reactor.rate_constants(T1, catalyst)
    k1_hi, k2_hi = reactor.rate_constants(T2, catalyst)
    inv = 1.0 / (T2 + 273.15) - 1.0 / (T1 + 273.15)
    np.testing.assert_allclose(k1_hi / k1_lo, np.exp(-reactor.E1 / constants.R * inv), rtol=1e-9)
    np.testing.assert_allclose(k2_hi / k2_lo, np.exp(-reactor.E2 / constants.R * inv), rtol=1e-9)
    # The same law read the other way: the slope of ln k against 1/T (Arrhenius plot) is -Ea/R.
    temps = np.linspace(60.0, 110.0, 11)
    k1, _ = reactor.rate_constants(temps, catalyst)
    fit = stats.linregress(1.0 / (temps + 273.15), np.log(k1))
    np.testing.assert_allclose(-fit.slope * constants.R, reactor.E1, rtol=1e-6)


def test_adiabatic_rise_from_heat_balance(reactor):
    # Reference: adiabatic heat balance dT_ad = C_A0 * sum(-dH_i * X_i) / (rho * cp)
    # (Levenspiel 1999, ch. 9, adiabatic operation), with conversions from the numerical integration.
    setting = (95.0, 120.0, 2.0)
    a, _, c = integrate_batch(*(float(k) for k in reactor.rate_constants(95.0, 2.0)), 120.0)
    expected = reactor.C_A0 * (-reactor.DH1 * (1 - a) + -reactor.DH2 * c) / (reactor.RHO * reactor.CP)
    np.testing.assert_allclose(reactor.truth(np.array([setting]))["adiabatic_rise"][0], expected, rtol=1e-3)


# --------------------------------------------------------------------------------- spot-weld physics
def test_joule_heat_scales_with_current_squared_and_time(spotweld):
    # Reference: Joule's first law, Q = I^2 R t: at fixed resistance (fixed force) heat scales as I^2 t.
    q = spotweld.joule_heat(8.0, 150.0, 3.5)
    np.testing.assert_allclose(spotweld.joule_heat(16.0, 150.0, 3.5), 4.0 * q, rtol=1e-12)
    np.testing.assert_allclose(spotweld.joule_heat(8.0, 300.0, 3.5), 2.0 * q, rtol=1e-12)
    np.testing.assert_allclose(q, 8e3**2 * float(spotweld.resistance(3.5)) * 0.150, rtol=1e-12)


def test_contact_resistance_follows_holm(spotweld):
    # Reference: Holm, Electric Contacts, 4th ed. 1967: constriction resistance rho/(2a) with
    # a = sqrt(F/(pi H)), hence the contact part scales as F^(-1/2).
    contact = spotweld.resistance(np.array([2.0, 4.5])) - spotweld.R_BULK
    np.testing.assert_allclose(contact[0] / contact[1], np.sqrt(4.5 / 2.0), rtol=1e-12)


def test_expulsion_is_a_failed_run(spotweld):
    hot = {"current": 12.0, "weld_time": 400.0, "force": 2.0}
    truth = spotweld.truth(np.array([[12.0, 400.0, 2.0], [9.0, 200.0, 3.0]]))
    assert truth["works"].tolist() == [False, True]
    assert all(np.isnan(truth[r][0]) and np.isfinite(truth[r][1]) for r in spotweld.RESPONSES)
    assert not spotweld.feasible(np.array([[12.0, 400.0, 2.0]]))[0]
    with pytest.raises(RunFailed, match="expulsion"):
        spotweld.evaluate(hot, seed=0)


def test_expulsion_threshold_scatters_as_stated(spotweld):
    # Reference: with a lognormal threshold of log-sd s, a setting whose effective heat lies one s below
    # the nominal threshold works with probability Phi(1) (standard normal cdf, scipy.stats.norm).
    weld_time, force = 250.0, 3.0
    threshold = spotweld.Q_EXP * (force / spotweld.F_REF) ** spotweld.EXP_FORCE_EXPONENT
    q_eff = threshold * np.exp(-spotweld.EXP_SCATTER)
    current = np.sqrt((q_eff / (weld_time * 1e-3) + spotweld.P_LOSS) / float(spotweld.resistance(force))) / 1e3
    n, works = 2000, 0
    for seed in range(n):
        try:
            spotweld.evaluate({"current": current, "weld_time": weld_time, "force": force}, seed=seed)
            works += 1
        except RunFailed:
            pass
    p = stats.norm.cdf(1.0)
    assert abs(works / n - p) < 4 * np.sqrt(p * (1 - p) / n)


# --------------------------------------------------------------------------------- tempering physics
def test_equal_tempering_parameter_gives_equal_hardness(tempering):
    # Reference: Hollomon and Jaffe, "Time-temperature relations in tempering steel", Trans. AIME 162
    # (1945): hardness depends on T (K) and t (h) only through P = T (C + log10 t); C = 20 is common
    # practice, no source.
    T1, t1 = 520.0, 4.0
    P = (T1 + 273.15) * (20.0 + np.log10(t1))
    others = np.array([420.0, 470.0, 560.0, 600.0])
    t_equal = 10 ** (P / (others + 273.15) - 20.0)
    X = np.vstack([[T1, t1], np.column_stack([others, t_equal])])
    hardness = tempering.truth(X)["hardness"]
    np.testing.assert_allclose(hardness, hardness[0], rtol=1e-12)
    np.testing.assert_allclose(tempering.tempering_parameter(others, t_equal), P, rtol=1e-12)
    # and a larger P (hotter, same time) tempers further: lower hardness
    assert tempering.truth(np.array([[T1 + 20.0, t1]]))["hardness"][0] < hardness[0]


# ------------------------------------------------------------------------------------------- noise
@pytest.mark.parametrize("name", CASES)
def test_noise_is_seeded(name):
    sim = load_simulator(name)
    setting = INTERIOR[name]
    assert sim.evaluate(setting, seed=42) == sim.evaluate(setting, seed=42)
    a, b = sim.evaluate(setting, seed=1), sim.evaluate(setting, seed=2)
    assert all(a[r] != b[r] for r in sim.RESPONSES)


@pytest.mark.parametrize("name", CASES)
def test_noise_has_the_stated_size(name):
    # Reference: the sample standard deviation of 2000 draws is within 10 % of the population value
    # (its own sd is about 1.6 % for normal data); the mean within 4 standard errors.
    sim = load_simulator(name)
    setting = INTERIOR[name]
    true = sim.truth(np.array([[setting[f] for f in sim.FACTORS]]))
    runs = [sim.evaluate(setting, seed=s) for s in range(2000)]
    for r in sim.RESPONSES:
        noise = sim.NOISE[r]
        y = np.array([run[r] for run in runs])
        err = y - true[r][0] if noise.kind == "additive" else np.log(y / true[r][0])
        assert abs(err.std(ddof=1) / noise.sd - 1) < 0.10, r
        assert abs(err.mean()) < 4 * noise.sd / np.sqrt(len(err)), r


@pytest.mark.parametrize("name", CASES)
def test_evaluate_names_a_missing_factor(name):
    sim = load_simulator(name)
    setting = dict(INTERIOR[name])
    missing = sim.FACTORS[-1]
    del setting[missing]
    with pytest.raises(InputError, match=missing):
        sim.evaluate(setting, seed=0)
    with pytest.raises(InputError, match="finite"):
        sim.evaluate({**INTERIOR[name], missing: float("nan")}, seed=0)
    # extra keys (a run id, a note) are ignored
    assert sim.evaluate({**INTERIOR[name], "run": "R7"}, seed=3) == sim.evaluate(INTERIOR[name], seed=3)


# ------------------------------------------------------------------------------- feasible region
@pytest.mark.parametrize("name", CASES)
def test_true_window_is_a_proper_curved_part_of_the_space(name):
    # Brute force on a full grid over the study's factor ranges.
    sim = load_simulator(name)
    X = grid(sim.BOUNDS, 30 if len(sim.FACTORS) == 3 else 150)
    for j, f in enumerate(sim.FACTORS):   # a categorical factor: its levels only (level index)
        if f in getattr(sim, "LEVELS", {}):
            X = np.unique(np.column_stack([X[:, :j], np.round(X[:, j]), X[:, j + 1:]]), axis=0)
    ok = sim.feasible(X)
    share = ok.mean()
    assert 0.05 <= share <= 0.60, share
    # non-rectangular: the feasible points fill clearly less than their bounding box
    lo, hi = X[ok].min(axis=0), X[ok].max(axis=0)
    in_box = np.all((X >= lo) & (X <= hi), axis=1)
    assert ok.sum() / in_box.sum() < 0.7
    # every safety limit removes settings that meet all other limits
    truth = sim.truth(X)
    met = {r: _within(truth[r], low, high) for r, (low, high) in sim.LIMITS.items()}
    for r in sim.LIMITS:
        others_ok = truth["works"] & np.all([m for r2, m in met.items() if r2 != r], axis=0)
        np.testing.assert_array_equal(ok, others_ok & met[r])
        if r in _safety_responses(name):
            assert (others_ok & ~met[r]).any(), f"safety limit on {r} never binds"


def _within(values, low, high):
    """Limit met (NaN, i.e. failed, counts as not met)."""
    with np.errstate(invalid="ignore"):
        return (values >= (-np.inf if low is None else low)) & (values <= (np.inf if high is None else high))


def _safety_responses(name):
    with open(case_dir(name) / "study.toml", "rb") as fh:
        return {r["name"] for r in tomllib.load(fh)["response"] if r["kind"] == "safety"}


# ------------------------------------------------------------------------- example runs and the entry
@pytest.mark.parametrize("case", CASES)
def test_example_runs_are_the_simulators_own(case):
    """The shipped runs.csv is exactly what the case's simulator gives for the seeded space-filling
    start (regenerated here byte for byte), with every setting inside the study's ranges."""
    from windowfinder.cases.examples import EXAMPLE_RUNS, example_runs_text
    from windowfinder.inputs.runs import read_runs
    from windowfinder.inputs.spec import StudySpec

    path = case_dir(case) / "runs.csv"
    assert path.read_text(encoding="utf-8") == example_runs_text(case)
    spec = StudySpec.from_toml(case_dir(case) / "study.toml")
    runs = read_runs(path, spec).frame
    assert len(runs) == EXAMPLE_RUNS and set(runs["status"]) <= {"done", "failed"}
    X = runs[spec.factor_names].to_numpy(float)
    assert (X >= spec.lows).all() and (X <= spec.lows + spec.spans).all()


def _entry(case, tmp_path, text, *extra):
    import subprocess
    import sys

    (tmp_path / "in.csv").write_text(text, encoding="utf-8")
    return subprocess.run([sys.executable, "-m", f"windowfinder.cases.{case}", "in.csv", "out.csv", *extra],
                          cwd=tmp_path, capture_output=True, text=True, timeout=60)


def test_entry_follows_the_run_protocol(tmp_path, spotweld):
    """``python -m windowfinder.cases.spotweld IN OUT --seed N``: one output row per input row, values
    equal to the simulator called directly with seed CRC-32("N:run"); a run the process fails
    (expulsion at high current and long weld time, see the case README) is written as failed."""
    import zlib

    import pandas as pd

    good = INTERIOR["spotweld"]
    rows = [("A1", good), ("A2", {"current": 12.0, "weld_time": 400.0, "force": 2.0})]
    text = "run,current,weld_time,force\n" + "".join(
        f"{run},{s['current']},{s['weld_time']},{s['force']}\n" for run, s in rows)
    proc = _entry("spotweld", tmp_path, text, "--seed", "4")
    assert proc.returncode == 0, proc.stderr
    out = pd.read_csv(tmp_path / "out.csv", dtype={"run": str})
    assert list(out.columns) == ["run", *spotweld.RESPONSES, "status", "note"]
    assert list(out["run"]) == ["A1", "A2"]
    expected = spotweld.evaluate(good, seed=zlib.crc32(b"4:A1"))
    for name, value in expected.items():
        assert out.loc[0, name] == pytest.approx(value, rel=1e-12)
    assert out.loc[0, "status"] == "done"
    with pytest.raises(RunFailed):
        spotweld.evaluate(rows[1][1], seed=zlib.crc32(b"4:A2"))
    assert out.loc[1, "status"] == "failed" and out.loc[1, spotweld.RESPONSES].isna().all()


def test_entry_rejects_a_bad_input_file_in_one_line(tmp_path, reactor, capsys):
    from windowfinder.cases.entry import main

    for text, words in [("run,temperature,time\nR1,80,60\n", ["catalyst"]),
                        ("run,temperature,time,catalyst\nR1,80,sixty,1\n", ["row 2", "time"]),
                        ("run,temperature,time,catalyst\n", ["no runs"])]:
        (tmp_path / "in.csv").write_text(text, encoding="utf-8")
        code = main(reactor, "reactor", [str(tmp_path / "in.csv"), str(tmp_path / "out.csv")])
        err = capsys.readouterr().err
        assert code == 2 and len(err.strip().splitlines()) == 1
        assert all(w in err for w in words), err
        assert not (tmp_path / "out.csv").exists()
