"""Designs in slices (windowfinder.inputs.slices): sliced Latin hypercubes and runs spread over blocks."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from windowfinder.errors import InputError
from windowfinder.inputs.designs import central_composite, is_latin
from windowfinder.inputs.slices import sliced_latin_hypercube, spread_over_blocks

from conftest import snapshot


@settings(max_examples=25, deadline=None)
@given(d=st.integers(1, 5), t=st.integers(1, 5), m=st.integers(1, 8), seed=st.integers(0, 10_000))
def test_sliced_latin_hypercube_is_latin_overall_and_per_slice(d, t, m, seed):
    # the defining properties of Qian (2012), JASA 107, §2: the union is a Latin hypercube of m t runs
    # (McKay, Beckman & Conover 1979) and every slice is a Latin hypercube of m runs
    X, s = sliced_latin_hypercube(d, t, m, seed=seed, candidates=2)
    assert X.shape == (m * t, d) and ((X >= 0) & (X < 1)).all()
    assert is_latin(X)
    assert np.bincount(s).tolist() == [m] * t
    for k in range(t):
        assert is_latin(X[s == k])


def test_sliced_design_is_reproducible_and_rejects_empty_slices():
    a, _ = sliced_latin_hypercube(3, 2, 5, seed=4)
    b, _ = sliced_latin_hypercube(3, 2, 5, seed=4)
    np.testing.assert_array_equal(a, b)
    with pytest.raises(InputError):
        sliced_latin_hypercube(3, 0, 5)


def test_spread_over_blocks_balances_sizes_and_splits_replicates():
    U = central_composite(3, "face")
    U = np.vstack([U, np.full((3, 3), 0.5)])             # 3 extra centre runs
    b = spread_over_blocks(U, 3, seed=1)
    assert len(U) == 17 and sorted(np.bincount(b).tolist()) == [5, 6, 6]
    centre = np.where((U == 0.5).all(axis=1))[0]
    assert len(set(b[centre])) == min(len(centre), 3)    # replicated centre runs in different blocks
    with pytest.raises(InputError, match="cannot spread"):
        spread_over_blocks(U, 0)


def test_design_cli_in_blocks(study_dir):
    import subprocess
    import sys

    from windowfinder.inputs.runs import read_runs
    from windowfinder.inputs.spec import StudySpec

    # the fixture's table has runs without block labels: designing in blocks is refused, nothing written
    before = snapshot(study_dir)
    run = subprocess.run([sys.executable, "-m", "windowfinder", "design", str(study_dir), "--blocks", "2"],
                         capture_output=True, text=True)
    assert run.returncode == 2 and "no block label" in run.stderr and "Traceback" not in run.stderr
    assert snapshot(study_dir) == before
    (study_dir / "runs.csv").unlink()
    run = subprocess.run([sys.executable, "-m", "windowfinder", "design", str(study_dir), "--runs", "13",
                          "--blocks", "2"], capture_output=True, text=True)
    assert run.returncode == 2 and "cannot be split evenly" in run.stderr
    run = subprocess.run([sys.executable, "-m", "windowfinder", "design", str(study_dir), "--runs", "12",
                          "--blocks", "3"], capture_output=True, text=True)
    assert run.returncode == 0, run.stderr
    spec = StudySpec.from_toml(study_dir / "study.toml")
    table = read_runs(study_dir / "runs.csv", spec)
    blocks = table.blocks()
    assert sorted(set(blocks)) == ["B1", "B2", "B3"] and all((blocks == b).sum() == 4 for b in set(blocks))
    U = table.X_coded()
    assert is_latin(U)                                   # steps snapped inside their strata
    for b in set(blocks):
        assert is_latin(U[blocks == b])
