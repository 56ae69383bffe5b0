"""Options declared with type and range (coreach.config.option_specs): what passes, and the one line for what does not."""

from __future__ import annotations

import math
from dataclasses import dataclass

import pytest

from coreach.errors import ConfigError
from coreach.config.option_specs import check_options, choice, integer, number, text, vector


@dataclass(kw_only=True)
class Options:
    label: str = text(what="a label")
    share: float = number(0.2, 0.0, 1.0, open_range=True)
    radius: float | None = number(None, 0.0, 2.0, "m", optional=True)
    count: int = integer(3, 1)
    mode: str = choice("a", ("a", "b"))
    offset: tuple = vector((0.0, 0.0, 0.0), 3, "m")


def test_defaults_fill_in_and_numbers_become_floats():
    out = check_options(Options, {"label": "x", "share": 0.5, "radius": 2}, "f.yaml")
    assert out == {"label": "x", "share": 0.5, "radius": 2.0, "count": 3, "mode": "a", "offset": (0.0, 0.0, 0.0)}
    assert isinstance(out["radius"], float)


@pytest.mark.parametrize("key, value, expected", [
    ("share", 0.0, "expected a number in (0.0, 1.0)"),          # open range: the bound itself is out
    ("share", "0.5", "expected a number in (0.0, 1.0), got '0.5'"),  # a string that looks like a number
    ("share", math.nan, "expected a number in (0.0, 1.0)"),
    ("radius", -0.1, "expected a number in [0.0, 2.0] m or null"),
    ("count", 0, "expected an integer >= 1"),
    ("count", True, "expected an integer >= 1"),                 # bool is an int to Python, not here
    ("count", 2.0, "expected an integer >= 1"),
    ("mode", "c", "expected one of 'a', 'b'"),
    ("offset", [0, 0], "expected a list of 3 numbers in m"),
    ("label", "", "expected a label"),
])  # fmt: skip
def test_a_bad_value_names_the_option_and_the_range(key, value, expected):
    with pytest.raises(ConfigError) as err:
        check_options(Options, {"label": "x", key: value}, "f.yaml")
    assert err.value.where == f"f.yaml, option {key}"
    assert expected in err.value.problem


def test_unknown_and_missing_options():
    with pytest.raises(ConfigError, match="unknown option"):
        check_options(Options, {"label": "x", "colour": 1}, "f.yaml")
    with pytest.raises(ConfigError) as err:
        check_options(Options, {}, "f.yaml")
    assert err.value.where == "f.yaml, option label" and "is required" in err.value.problem
