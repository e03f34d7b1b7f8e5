"""Study file parsing: valid files parse into dataclasses; every bad-input class is refused clearly."""

from __future__ import annotations

import numpy as np
import pytest

from windowfinder.errors import InputError
from windowfinder.inputs.spec import StudySpec
from conftest import STUDY


def parse(text):
    import tomllib

    return StudySpec.from_dict(tomllib.loads(text), source="study.toml")


def test_parses_factors_and_responses():
    spec = parse(STUDY)
    assert spec.factor_names == ["temperature", "time"]
    assert spec.response_names == ["yield", "exotherm"]
    assert spec.confidence == 0.9 and spec.seed == 3
    assert spec.limited[0].name == "exotherm"  # safety limits come first
    assert spec.factor("temperature").tolerance == 1.0
    assert [r.model for r in spec.responses] == ["auto", "auto"]   # default: chosen by leave-one-out
    assert parse(STUDY.replace('unit = "%"', 'unit = "%"\nmodel = "linear"')).response("yield").model == "linear"


def test_coded_natural_round_trip():
    spec = parse(STUDY)
    X = np.array([[40.0, 30.0], [65.0, 105.0], [90.0, 180.0]])
    U = spec.to_coded(X)
    np.testing.assert_allclose(U, [[0, 0], [0.5, 0.5], [1, 1]])
    np.testing.assert_allclose(spec.to_natural(U), X)


def test_round_to_step_stays_on_grid_and_in_bounds():
    spec = parse(STUDY)
    X = spec.round_to_step([[40.26, 100.0], [89.99, 33.3]])
    np.testing.assert_allclose(X[:, 0], [40.5, 90.0])
    assert X[1, 1] == 33.3  # no step on time: unchanged


def test_margin_sign_convention():
    spec = parse(STUDY)
    np.testing.assert_allclose(spec.response("yield").margin([79.0, 85.0]), [-1.0, 5.0])
    np.testing.assert_allclose(spec.response("exotherm").margin([40.0, 55.0]), [10.0, -5.0])


BAD = [
    (STUDY.replace("high = 90.0", "hgih = 90.0"), ["hgih", "high"]),
    (STUDY.replace("low = 40.0", "low = 95.0"), ["low", "high"]),
    (STUDY.replace('name = "time"', 'name = "temperature"'), ["duplicate", "temperature"]),
    (STUDY.replace('name = "time"\n', ""), ["missing", "name"]),
    (STUDY.replace('max = 50.0\nkind = "safety"', 'kind = "safety"'), ["goal", "none"]),
    (STUDY.replace('goal = "maximize"', 'goal = "target"'), ["target"]),
    (STUDY.replace("min = 80.0", "min = 80.0\nmax = 70.0"), ["min", "max"]),
    (STUDY.replace("confidence = 0.9", "confidence = 1.5"), ["confidence"]),
    (STUDY.replace('unit = "%"', 'unit = "%"\ntransform = "logit"'), ["logit", "bounds"]),
    (STUDY.replace('goal = "maximize"', 'goal = "maximise"'), ["maximize"]),
    (STUDY.replace("seed = 3", "seed = -1"), ["seed"]),
    (STUDY.replace("low = 40.0", 'low = "forty"'), ["low", "number"]),
    (STUDY.replace('unit = "%"', 'unit = "%"\nmodel = "quadratc"'), ["model", "quadratic"]),
]


@pytest.mark.parametrize("text,words", BAD)
def test_bad_study_files_are_refused_with_one_line(text, words):
    with pytest.raises(InputError) as e:
        parse(text)
    msg = str(e.value)
    assert "\n" not in msg and msg.startswith("study.toml")
    for w in words:
        assert w in msg


def test_invalid_toml_names_the_line(tmp_path):
    p = tmp_path / "study.toml"
    p.write_text(STUDY.replace('unit = "min"', 'unit = "min'))
    with pytest.raises(InputError) as e:
        StudySpec.from_toml(p)
    assert "line 16" in str(e.value)  # the unterminated string is on line 16
