"""Parameter validation (adaptkit/_checks.py): every error names the parameter, its owner, what is accepted and
what was received (the wording of scikit-learn's parameter validation)."""
import math
import re
from dataclasses import dataclass

import pytest

from adaptkit._checks import build_options, check_choice, check_known, check_number, check_widths


def test_check_choice():
    assert check_choice("kernel", "MMD", "rbf", ["rbf", "linear"]) == "rbf"
    with pytest.raises(ValueError, match=re.escape("The 'kernel' parameter of MMD must be one of {'rbf', 'linear'}. "
                                                   "Got 'gausian' instead.")):
        check_choice("kernel", "MMD", "gausian", ["rbf", "linear"])


@pytest.mark.parametrize("value, kw, message", [
    (True, {}, "must be a number. Got True instead."),  # a bool is not a number here
    ("3", {}, "must be a number. Got '3' instead."),
    (2.5, {"integer": True}, "must be an integer. Got 2.5 instead."),
    (math.nan, {}, "must be finite. Got nan instead."),
    (math.inf, {"low": 0}, "must be finite. Got inf instead."),
    (0, {"low": 0, "low_open": True}, "must be in the range (0, inf). Got 0 instead."),
    (1.0, {"low": 0, "high": 1, "high_open": True}, "must be in the range [0, 1). Got 1.0 instead."),
    (-1, {"high": -2}, "must be in the range (-inf, -2]. Got -1 instead."),
])
def test_check_number_refuses_with_the_range(value, kw, message):
    with pytest.raises((TypeError, ValueError), match=re.escape(f"The 'x' parameter of f {message}")):
        check_number("x", "f", value, **kw)


def test_check_number_accepts_and_converts():
    assert check_number("x", "f", 3.0, integer=True) == 3 and isinstance(check_number("x", "f", 3.0, integer=True), int)
    assert check_number("x", "f", 0, low=0) == 0 and check_number("x", "f", 1, high=1) == 1


def test_check_known_and_build_options():
    @dataclass
    class Options:
        a: int = 1
        b: float = 2.0

    assert build_options(Options, "method 'm'", {"b": 3.0}) == Options(1, 3.0)
    with pytest.raises(ValueError, match=re.escape("Unknown option 'c' for method 'm'. Accepted options: a, b.")):
        build_options(Options, "method 'm'", {"c": 1})
    with pytest.raises(ValueError, match=re.escape("Unknown keys 'x', 'y' in the grid. Accepted keys: (none).")):
        check_known({"y": 1, "x": 2}, [], noun="key", where="in the grid")


def test_check_widths():
    assert check_widths("hidden", "encoder 'mlp'", (4, 8.0)) == [4, 8]
    with pytest.raises(TypeError, match="must be a list of positive integers. Got '64' instead"):
        check_widths("hidden", "encoder 'mlp'", "64")
    with pytest.raises(ValueError, match=re.escape("The 'hidden' parameter of encoder 'mlp' must be in the range "
                                                   "[1, inf). Got 0 instead.")):
        check_widths("hidden", "encoder 'mlp'", [4, 0])
