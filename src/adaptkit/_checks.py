"""Parameter validation at the library's boundary: every error names the parameter, its owner, what is
accepted and what was received (the style of scikit-learn's parameter validation)."""
from __future__ import annotations

import dataclasses
import math
from typing import Any, Iterable, Type, TypeVar

D = TypeVar("D")


def check_choice(param: str, owner: str, value: Any, choices: Iterable[Any]) -> Any:
    choices = list(choices)
    if value not in choices:
        raise ValueError(
            f"The {param!r} parameter of {owner} must be one of {{{', '.join(map(repr, choices))}}}. Got {value!r} instead."
        )
    return value


def check_number(param: str, owner: str, value: Any, *, low=None, high=None, low_open=False,
                 high_open=False, integer=False) -> Any:
    kind = "an integer" if integer else "a number"
    if isinstance(value, bool) or not isinstance(value, (int, float)) or (integer and not float(value).is_integer()):
        raise TypeError(f"The {param!r} parameter of {owner} must be {kind}. Got {value!r} instead.")
    if not math.isfinite(value):
        raise ValueError(f"The {param!r} parameter of {owner} must be finite. Got {value!r} instead.")
    lo_ok = low is None or (value > low if low_open else value >= low)
    hi_ok = high is None or (value < high if high_open else value <= high)
    if not (lo_ok and hi_ok):
        lo = "-inf" if low is None else low
        hi = "inf" if high is None else high
        rng = f"{'(' if low_open or low is None else '['}{lo}, {hi}{')' if high_open or high is None else ']'}"
        raise ValueError(f"The {param!r} parameter of {owner} must be in the range {rng}. Got {value!r} instead.")
    return int(value) if integer else value


def check_known(given, accepted, *, noun: str, where: str, note: str = "") -> None:
    """Refuse keys outside ``accepted``: "Unknown option 'x' for method 'dann'. Accepted options: a, b." — the one
    wording for options, shift parameters and config keys (never silently swallowed)."""
    accepted = list(accepted)
    unknown = sorted(set(given) - set(accepted))
    if unknown:
        raise ValueError(
            f"Unknown {noun}{'s' if len(unknown) > 1 else ''} {', '.join(map(repr, unknown))} {where}. "
            f"Accepted {noun}s: {', '.join(accepted) if accepted else '(none)'}{note}."
        )


def build_options(cls: Type[D], owner: str, options: dict) -> D:
    """Instantiate the options dataclass ``cls`` from ``options``; unknown keys raise a ValueError listing the
    accepted ones (never silently swallowed)."""
    check_known(options, [f.name for f in dataclasses.fields(cls)], noun="option", where=f"for {owner}")
    return cls(**options)

def check_widths(param: str, owner: str, value: Any) -> list:
    """A list of positive layer widths, or a TypeError/ValueError naming the option."""
    if isinstance(value, (str, bytes)) or not hasattr(value, "__iter__"):
        raise TypeError(f"The {param!r} parameter of {owner} must be a list of positive integers. Got {value!r} instead.")
    return [check_number(param, owner, h, low=1, integer=True) for h in value]
