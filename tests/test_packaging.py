"""The installed package carries the bundled cases, and the top level is what the project card names.

Expectations from outside the code: the package list setuptools' own discovery finds in the tree
(``setuptools.find_packages``), setuptools' ``build_py`` step (the step that lays out a wheel's files,
setuptools documentation, "Package Discovery" / ``package-dir``), and the project card's top level
(issue 13: README.md, DEVELOPERS.md, pyproject.toml, windowfinder, tests, cases, docs).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from windowfinder.cases import CASES

ROOT = Path(__file__).resolve().parents[1]
CASE_FILES = {"__init__.py", "__main__.py", "simulator.py", "study.toml", "README.md", "runs.csv"}


def config() -> dict:
    with open(ROOT / "pyproject.toml", "rb") as fh:
        return tomllib.load(fh)["tool"]["setuptools"]


def test_top_level_matches_the_project_card():
    card = {"README.md", "DEVELOPERS.md", "pyproject.toml", "windowfinder", "tests", "cases", "docs"}
    assert card <= {p.name for p in ROOT.iterdir()}


def test_pyproject_lists_every_package_and_maps_every_case():
    setuptools = pytest.importorskip("setuptools")
    found = set(setuptools.find_packages(str(ROOT), include=["windowfinder", "windowfinder.*"]))
    cases = {f"windowfinder.cases.{c}" for c in CASES}
    cfg = config()
    assert set(cfg["packages"]) == found | cases
    assert cfg["package-dir"] == {f"windowfinder.cases.{c}": f"cases/{c}" for c in CASES}
    for c in CASES:
        assert {"*.toml", "*.md", "*.csv"} <= set(cfg["package-data"][f"windowfinder.cases.{c}"])
        assert CASE_FILES <= {p.name for p in (ROOT / "cases" / c).iterdir()}
    folders = {p.name for p in (ROOT / "cases").iterdir() if (p / "study.toml").is_file()}
    assert folders == set(CASES)


def test_built_package_carries_the_cases(tmp_path):
    """Lay the package out as a wheel does (setuptools build_py), then use it from outside the
    checkout: the cases resolve inside the built tree and ``new --example`` + ``check`` work."""
    pytest.importorskip("setuptools")
    src = tmp_path / "src"
    ignore = shutil.ignore_patterns("__pycache__", "*.pyc")
    for name in ("windowfinder", "cases"):
        shutil.copytree(ROOT / name, src / name, ignore=ignore)
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / name, src / name)
    lib = tmp_path / "lib"
    build = subprocess.run([sys.executable, "-c", "from setuptools import setup; setup()", "-q",
                            "build_py", "--build-lib", str(lib)], cwd=src, capture_output=True,
                           text=True, timeout=120)
    assert build.returncode == 0, build.stderr
    for c in CASES:
        assert CASE_FILES <= {p.name for p in (lib / "windowfinder" / "cases" / c).iterdir()}
    shutil.rmtree(src)  # nothing of the checkout is left to fall back on
    env = {**os.environ, "PYTHONPATH": str(lib)}
    work = tmp_path / "work"
    work.mkdir()
    script = ("import sys; from windowfinder import cli; from windowfinder.cases import case_dir; "
              "print(case_dir('reactor')); "
              "sys.exit(cli.main(['new', 'x', '--example', 'reactor']) or cli.main(['check', 'x']))")
    proc = subprocess.run([sys.executable, "-c", script], cwd=work, env=env, capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert Path(proc.stdout.splitlines()[0]).is_relative_to(lib.resolve())
    assert "runs: 12 in runs.csv" in proc.stdout
    assert (work / "x" / "runs.csv").read_bytes() == (ROOT / "cases" / "reactor" / "runs.csv").read_bytes()
