"""Speed: wall time of the main steps on small studies, and against a plain scikit-learn GP fit.

Measured on a synthetic study (:func:`synthetic_study`, made up for this benchmark; the numbers are not
from any process): ``d`` factors ``x1..xd`` on 0..10 (tolerance 0.1) and, in coded units ``u`` in
[0, 1]^d with weights ``w_j = 2 / j`` and ``c = u - 0.5``,

* ``purity`` (%) = 96 - 32 (u1 - 0.45)^2 - 16 c2^2 - sum_{j>=3} 4 w_j c_j^2 + 1.5 c1 c2, noise sd 0.4;
  limit >= 93, maximize;
* ``byproduct`` (%) = exp(-1 + 1.5 u1 + 0.8 u2 - 0.3 mean_{j>=3}(w_j u_j)), log-normal noise sd 0.05;
  limit <= 1.5, minimize, log transform;
* ``rise`` (K) = 20 + 15 u1 u2 + 10 u2^2 + 2 sin(3 ud), noise sd 0.5; safety limit <= 38.

Runs are a seeded Latin hypercube. Timings are wall clock on this machine with single-threaded BLAS
(windowfinder's default); other work on the machine slows them, so the load average is printed with
them. Figures are printed, never asserted. ``main(quick)`` returns the Markdown section.
"""

from __future__ import annotations

import contextlib
import io
import os
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.stats import qmc
from sklearn.exceptions import ConvergenceWarning
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel
from threadpoolctl import threadpool_limits

from windowfinder import cli
from windowfinder.answers import build_tradeoff, build_window
from windowfinder.study import Study

RESPONSES = ("purity", "byproduct", "rise")
_RESPONSE_TOML = {
    "purity": 'name = "purity"\nunit = "%"\ngoal = "maximize"\nmin = 93.0\n',
    "byproduct": 'name = "byproduct"\nunit = "%"\ngoal = "minimize"\nmax = 1.5\ntransform = "log"\n',
    "rise": 'name = "rise"\nunit = "K"\ngoal = "none"\nmax = 38.0\nkind = "safety"\n',
}


def synthetic_responses(U, rng=None) -> dict:
    """The three synthetic responses at coded settings ``U`` (n, d), d >= 2; noisy when ``rng`` is given."""
    U = np.atleast_2d(np.asarray(U, dtype=float))
    d = U.shape[1]
    w = 2.0 / np.arange(1, d + 1)
    c = U - 0.5
    purity = (96.0 - 32.0 * (U[:, 0] - 0.45) ** 2 - 16.0 * c[:, 1] ** 2
              - (4.0 * w[2:] * c[:, 2:] ** 2).sum(axis=1) + 1.5 * c[:, 0] * c[:, 1])
    log_by = -1.0 + 1.5 * U[:, 0] + 0.8 * U[:, 1] - 0.3 * (U[:, 2:] * w[2:]).sum(axis=1) / max(d - 2, 1)
    rise = 20.0 + 15.0 * U[:, 0] * U[:, 1] + 10.0 * U[:, 1] ** 2 + 2.0 * np.sin(3.0 * U[:, -1])
    if rng is not None:
        purity = purity + 0.4 * rng.standard_normal(len(U))
        log_by = log_by + 0.05 * rng.standard_normal(len(U))
        rise = rise + 0.5 * rng.standard_normal(len(U))
    return {"purity": purity, "byproduct": np.exp(log_by), "rise": rise}


def synthetic_study(directory, n: int, d: int, responses=RESPONSES, seed: int = 0) -> Path:
    """Write ``study.toml`` and ``runs.csv`` of the synthetic study (n runs, d factors) into ``directory``."""
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    text = [f'[study]\nname = "synthetic, {n} runs, {d} factors"\nconfidence = 0.95\nseed = 3\n']
    text += [f'[[factor]]\nname = "x{j + 1}"\nunit = "-"\nlow = 0.0\nhigh = 10.0\ntolerance = 0.1\n'
             for j in range(d)]
    text += [f"[[response]]\n{_RESPONSE_TOML[r]}" for r in responses]
    (directory / "study.toml").write_text("\n".join(text))
    U = qmc.LatinHypercube(d, seed=seed).random(n)
    Y = synthetic_responses(U, np.random.default_rng(seed))
    runs = pd.DataFrame(U * 10.0, columns=[f"x{j + 1}" for j in range(d)])
    runs.insert(0, "run", [f"R{i + 1}" for i in range(n)])
    for r in responses:
        runs[r] = Y[r]
    runs.to_csv(directory / "runs.csv", index=False)
    return directory


def timed(fn, *args, **kwargs):
    """``(result, seconds)`` of one call."""
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - t0


def say(text: str) -> None:
    print(text, flush=True)


def load_text() -> str:
    a, b, c = os.getloadavg()
    return f"load average {a:.1f} / {b:.1f} / {c:.1f} on {os.cpu_count()} cores"


def plain_gp_fit(X, y, restarts: int = 3, seed: int = 0) -> GaussianProcessRegressor:
    """scikit-learn GP as a user would write it: C * Matern-5/2 (ARD) + White, normalised y, 3 restarts."""
    kernel = ConstantKernel(1.0, (1e-2, 1e2)) * Matern(np.full(X.shape[1], 0.5), (0.05, 20.0), nu=2.5) \
        + WhiteKernel(1e-2, (1e-6, 1.0))
    gp = GaussianProcessRegressor(kernel, normalize_y=True, n_restarts_optimizer=restarts, random_state=seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        return gp.fit(X, y)


def _verdict(value, target):
    return "met" if value < target else "NOT met"


def _window_and_tradeoff(tmp, n, d):
    study = Study.load(synthetic_study(Path(tmp) / "wt", n, d))
    fit, t_fit = timed(study.fit)
    win, t_win = timed(build_window, study.spec, fit)
    tr, t_tr = timed(build_tradeoff, study.spec, fit)
    say(f"(a) n={n}, d={d}, 3 responses: fit {t_fit:.2f} s, window {t_win:.2f} s, trade-off {t_tr:.2f} s, "
        f"window + trade-off {t_win + t_tr:.2f} s ({win.message}; {tr.message})")
    return [("fit (3 GP models, LOO diagnostics)", t_fit, None),
            ("window (build_window)", t_win, None), ("trade-off (build_tradeoff)", t_tr, None),
            ("window + trade-off", t_win + t_tr, 10.0),
            ("fit + window + trade-off", t_fit + t_win + t_tr, None)]


def _report(tmp, n, d):
    try:
        from windowfinder.report import write_report
    except ImportError as err:
        say(f"(b) report skipped: windowfinder.report not importable ({err})")
        return [("report (skipped: not importable)", float("nan"), 30.0)]
    study = Study.load(synthetic_study(Path(tmp) / "rep", n, d))
    path, t_rep = timed(write_report, study)
    say(f"(b) report from scratch (fit, window, trade-off, influence, figures): {t_rep:.2f} s, "
        f"{path.stat().st_size / 1e6:.1f} MB")
    return [("report from scratch (write_report)", t_rep, 30.0)]


def _window_vs_sklearn(tmp, n, d):
    names = ("purity", "rise")
    folder = synthetic_study(Path(tmp) / "vs", n, d, responses=names)
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        code, t_verb = timed(cli.main, ["window", str(folder)])
    if code != 0:
        raise RuntimeError(f"windowfinder window exited with {code}")
    study = Study.load(folder)
    X, Y, _ = study.training_data()
    t_plain = sum(timed(plain_gp_fit, X, Y[r])[1] for r in names)
    ratio = t_verb / t_plain
    say(f"(c) n={n}, d={d}, 2 limited responses: 'windowfinder window' {t_verb:.2f} s; plain scikit-learn "
        f"GP fits (Matern-5/2 ARD + noise, 3 restarts) of the same 2 responses {t_plain:.2f} s; "
        f"ratio {ratio:.2f}")
    return [("'windowfinder window' (load, fit, LOO, window, files)", t_verb, None),
            ("plain scikit-learn GP fits, 2 responses, 3 restarts", t_plain, None),
            ("ratio window / plain fits", ratio, 4.0)]


def main(quick: bool = False) -> str:
    n_vs = 150 if quick else 400
    say(f"speed: {load_text()}")
    t0 = time.perf_counter()
    with threadpool_limits(1, user_api="blas"), tempfile.TemporaryDirectory() as tmp:
        rows_a = _window_and_tradeoff(tmp, 60, 4)
        rows_b = _report(tmp, 60, 4)
        rows_c = _window_vs_sklearn(tmp, n_vs, 6)
    say(f"speed done in {time.perf_counter() - t0:.0f} s; {load_text()}")

    def table(rows, unit="s"):
        out = ["| measurement | value | target | |", "|---|---|---|---|"]
        for label, v, target in rows:
            u = "" if unit is None else f" {unit}"
            out.append(f"| {label} | {v:.2f}{u} | " + ("" if target is None else f"< {target:g}{u}") + " | "
                       + ("" if target is None else _verdict(v, target)) + " |")
        return "\n".join(out)

    return "\n".join([
        "## Speed",
        "",
        "Synthetic study (see `benchmarks/speed.py`): factors x1..xd on 0..10, responses purity (>= 93, "
        "maximize), byproduct (<= 1.5, minimize, log scale) and rise (safety, <= 38), Latin-hypercube "
        "runs with noise. Wall clock, single-threaded BLAS, "
        f"{load_text()} at the end (other work on the machine slows every figure).",
        "",
        "### (a) Window and trade-off, 60 runs, 4 factors, 3 limited responses",
        "",
        table(rows_a),
        "",
        "### (b) Report, 60 runs, 4 factors, 3 responses",
        "",
        table(rows_b),
        "",
        f"### (c) `windowfinder window` against plain scikit-learn GP fits, {n_vs} runs, 6 factors, "
        "2 limited responses",
        "",
        table(rows_c[:2]),
        "",
        f"Ratio: **{rows_c[2][1]:.2f}** (target <= 4: {_verdict(rows_c[2][1], 4.0)}). windowfinder fits a "
        "richer kernel (Matern-5/2 ARD + quadratic trend + noise) with 5 restarts and then searches the "
        "window; its likelihood is evaluated by `windowfinder.models.likelihood` rather than scikit-learn's "
        "kernel-gradient tensor.",
    ])


if __name__ == "__main__":
    print(main(quick="--quick" in sys.argv))
