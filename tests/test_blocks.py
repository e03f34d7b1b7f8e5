"""Block offsets (day, lot, operator) as a random effect in the response GP (windowfinder.models.blocks)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from windowfinder.errors import InputError
from windowfinder.inputs.runs import read_runs, write_runs
from windowfinder.inputs.spec import StudySpec
from windowfinder.models.blocks import block_variance, indicators, log_likelihood, offsets

from conftest import STUDY, snapshot

ROOT = Path(__file__).resolve().parents[1]


def test_indicators_order_and_membership():
    Z, labels = indicators(["mon", "tue", "mon", "wed"])
    assert labels == ["mon", "tue", "wed"]
    np.testing.assert_array_equal(Z, [[1, 0, 0], [0, 1, 0], [1, 0, 0], [0, 0, 1]])


def test_log_likelihood_matches_scipy_multivariate_normal():
    # reference: scipy.stats.multivariate_normal with covariance K + tau2 Z Z'
    rng = np.random.default_rng(0)
    A = rng.standard_normal((7, 7))
    K = A @ A.T + 0.5 * np.eye(7)
    Z, _ = indicators(["a", "b", "a", "c", "b", "a", "c"])
    r = rng.standard_normal(7)
    want = stats.multivariate_normal(np.zeros(7), K + 0.8 * Z @ Z.T).logpdf(r)
    assert log_likelihood(K, Z, r, 0.8) == pytest.approx(want, rel=1e-10)


def test_offsets_equal_one_way_random_effects_blup():
    # Without a process term (K = s^2 I) the model is the one-way random-effects classification, whose
    # BLUP with known mean 0 is b_j = n_j tau2 / (n_j tau2 + s2) * mean_j (Searle, Casella & McCulloch
    # 1992, Variance Components, §3.4 (section number from memory); Robinson 1991, Stat. Sci. 6, eq. 1.2)
    rng = np.random.default_rng(1)
    labels = ["d1"] * 3 + ["d2"] * 5 + ["d3"] * 2
    Z, names = indicators(labels)
    r = rng.standard_normal(len(labels)) + Z @ np.array([1.0, -0.5, 2.0])
    s2, tau2 = 0.3, 0.7
    b = offsets(s2 * np.eye(len(r)), Z, r, tau2)
    n = Z.sum(axis=0)
    means = (Z.T @ r) / n
    np.testing.assert_allclose(b, n * tau2 / (n * tau2 + s2) * means, rtol=1e-10)


def test_block_variance_is_the_likelihood_maximum_by_grid_search():
    # brute force: the likelihood (scipy multivariate normal) on a fine log grid of tau2
    rng = np.random.default_rng(2)
    labels = np.repeat(["a", "b", "c", "d", "e"], 4)
    Z, _ = indicators(labels)
    r = 0.3 * rng.standard_normal(20) + Z @ rng.normal(0, 1.0, 5)
    K = 0.09 * np.eye(20)
    tau2 = block_variance(K, Z, r)
    grid = np.exp(np.linspace(np.log(1e-3), np.log(10.0), 4001))
    ll = [stats.multivariate_normal(np.zeros(20), K + t * Z @ Z.T).logpdf(r) for t in grid]
    assert tau2 == pytest.approx(grid[int(np.argmax(ll))], rel=0.01)


def _blocked_study(tmp_path, shift):
    """Simulated study: yield = smooth trend + a known shift per day + noise sd 0.3 (own scenario)."""
    d = tmp_path / "s"
    d.mkdir()
    (d / "study.toml").write_text(STUDY)
    spec = StudySpec.from_toml(d / "study.toml")
    rng = np.random.default_rng(5)
    days = np.repeat(list(shift), 9)
    u = rng.random((len(days), 2))
    temp, time = 40 + 50 * u[:, 0], 30 + 150 * u[:, 1]
    yld = 82 + 6 * u[:, 0] - 4 * (u[:, 1] - 0.5) ** 2 + np.array([shift[k] for k in days])
    yld += 0.3 * rng.standard_normal(len(days))
    import pandas as pd
    frame = pd.DataFrame({"run": [f"R{i:03d}" for i in range(len(days))], "temperature": temp, "time": time,
                          "yield": yld, "exotherm": 20 + 20 * u[:, 0], "status": "done", "block": days,
                          "note": ""})
    write_runs(d / "runs.csv", spec, frame)
    return d


def test_block_offsets_recovered_on_simulated_days(tmp_path):
    """Known day shifts (-2, 0, +3, -1 %) are recovered, and are not read as noise (true sd 0.3 %)."""
    from windowfinder.study import Study

    shift = {"mon": -2.0, "tue": 0.0, "wed": 3.0, "thu": -1.0}
    d = _blocked_study(tmp_path, shift)
    assert "block" in (d / "runs.csv").read_text().splitlines()[0]
    study = Study.load(d)
    fit = study.fit(n_restarts=2)
    dg = next(x for x in fit.diagnostics if x.response == "yield")
    got = np.array([dg.block_offsets[k] for k in shift])
    true = np.array(list(shift.values()))
    # offsets are relative to the average block: compare centred values
    np.testing.assert_allclose(got - got.mean(), true - true.mean(), atol=0.4)
    assert dg.noise_sd < 0.6          # without blocks the 2.1 % sd of the day shifts would be noise
    # a future run is in a new block: its predictive sd carries the block sd
    m = fit.surrogates.models["yield"]
    sd_new = m.predict(np.array([[0.5, 0.5]]), noise=True)[1][0]
    assert sd_new ** 2 >= m.noise_std_ ** 2 + m.block_sd_ ** 2 - 1e-12
    assert dg.block_sd > 1.0
    from windowfinder.report.sections import Content, models
    html = models(Content(study, fit))
    assert "Block offsets of yield" in html and "wed" in html


def test_fit_cli_prints_block_offsets_and_blank_block_is_refused(tmp_path):
    d = _blocked_study(tmp_path, {"mon": -2.0, "tue": 0.0, "wed": 3.0})
    run = subprocess.run([sys.executable, "-m", "windowfinder", "fit", str(d), "--restarts", "1"],
                         capture_output=True, text=True, cwd=ROOT)
    assert run.returncode == 0, run.stderr
    assert "block offsets" in run.stdout and "mon" in run.stdout
    assert json.loads((d / "out" / "fit.json").read_text())
    lines = (d / "runs.csv").read_text().splitlines()
    cells = lines[3].split(",")
    cells[lines[0].split(",").index("block")] = ""
    lines[3] = ",".join(cells)
    (d / "runs.csv").write_text("\n".join(lines) + "\n")
    before = snapshot(d)
    run = subprocess.run([sys.executable, "-m", "windowfinder", "fit", str(d)], capture_output=True, text=True,
                         cwd=ROOT)
    assert run.returncode == 2
    assert "line 4" in run.stderr and "'block' is empty" in run.stderr and "Traceback" not in run.stderr
    assert snapshot(d) == before


def test_block_column_with_quadratic_model_is_refused(tmp_path):
    from windowfinder.study import Study

    d = _blocked_study(tmp_path, {"mon": -2.0, "tue": 0.0, "wed": 3.0})
    with pytest.raises(InputError, match="block column needs the Gaussian-process model"):
        Study.load(d).fit(kind="quadratic")


def test_table_without_blocks_is_written_as_before(study_dir):
    spec = StudySpec.from_toml(study_dir / "study.toml")
    table = read_runs(study_dir / "runs.csv", spec)
    assert table.blocks() is None
    out = study_dir / "copy.csv"
    write_runs(out, spec, table.frame)
    assert "block" not in out.read_text().splitlines()[0]
