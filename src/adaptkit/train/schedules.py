"""Schedules: a factor as a function of progress ``p`` in [0, 1] through a training stage, in two tables.

- :data:`LR_SCHEDULES` — learning-rate factors, for the run's ``optim.schedule``: constant, dann_anneal, cosine.
- :data:`WEIGHT_SCHEDULES` — factors on a method's alignment weight λ, for its ``weight_schedule``: constant,
  dann_ramp.

A schedule is a plain function ``f(p, *, name=default, ...)``: its keyword-only parameters are its settings.
:func:`bind` fixes those found by name in a mapping of settings (a method's options, the optimiser's settings), so
DANN's ``gamma`` option reaches dann_ramp's γ, and an MMD run with ``weight_schedule=dann_ramp`` gets the paper's
γ = 10, without any method naming a schedule.

Example:
    >>> weight_schedule("dann_ramp", "method 'dann'", {"gamma": 5.0, "weight": 1.0})(0.0)
    0.0
"""
from __future__ import annotations

import functools
import inspect
import math
from typing import Any, Callable, Dict, Mapping, Optional

from .._checks import check_choice

Schedule = Callable[[float], float]


def constant(p: float) -> float:
    return 1.0


def dann_ramp(p: float, *, gamma: float = 10.0) -> float:
    """λ_p = 2 / (1 + exp(−γ·p)) − 1, rising from 0 at p = 0 to ≈1 at p = 1 (Ganin et al., JMLR 2016, §5.2.2;
    γ = 10)."""
    return 2.0 / (1.0 + math.exp(-gamma * p)) - 1.0


def dann_anneal(p: float, *, alpha: float = 10.0, beta: float = 0.75) -> float:
    """Learning-rate factor 1 / (1 + α·p)^β, so μ_p = μ₀ / (1 + α·p)^β (Ganin et al., JMLR 2016, §5.2.2;
    α = 10, β = 0.75)."""
    return 1.0 / (1.0 + alpha * p) ** beta


def cosine(p: float) -> float:
    """Cosine decay from 1 to 0 (Loshchilov & Hutter, ICLR 2017, Eq. 5 with η_min = 0, without restarts)."""
    return 0.5 * (1.0 + math.cos(math.pi * min(max(p, 0.0), 1.0)))


LR_SCHEDULES: Dict[str, Schedule] = {"constant": constant, "cosine": cosine, "dann_anneal": dann_anneal}
WEIGHT_SCHEDULES: Dict[str, Schedule] = {"constant": constant, "dann_ramp": dann_ramp}


def parameters(fn: Callable[..., float]) -> Dict[str, Any]:
    """A schedule's settings: its keyword-only parameters and their defaults (``dann_ramp`` → ``{'gamma': 10.0}``)."""
    return {k: v.default for k, v in inspect.signature(fn).parameters.items() if v.kind is v.KEYWORD_ONLY}


def bind(table: Mapping[str, Callable[..., float]], name: Any, *, param: str, owner: str,
         settings: Optional[Mapping[str, Any]] = None) -> Schedule:
    """The schedule ``table[name]`` as a function of ``p`` alone, each of its parameters taken from ``settings``
    where a key has its name (the default otherwise). An unknown ``name`` raises a ValueError naming ``param`` of
    ``owner`` and listing the table."""
    check_choice(param, owner, name, list(table))
    fn = table[name]
    given = {k: settings[k] for k in parameters(fn) if settings and k in settings}
    return functools.partial(fn, **given) if given else fn


def lr_schedule(name: Any, owner: str = "optim", settings: Optional[Mapping[str, Any]] = None) -> Schedule:
    """The learning-rate schedule ``name`` (``optim.schedule``), one of :data:`LR_SCHEDULES`."""
    return bind(LR_SCHEDULES, name, param="schedule", owner=owner, settings=settings)


def weight_schedule(name: Any, owner: str, settings: Optional[Mapping[str, Any]] = None) -> Schedule:
    """The alignment-weight schedule ``name`` (a method's ``weight_schedule``), one of :data:`WEIGHT_SCHEDULES`,
    with its parameters taken from ``settings`` (the method's options) by name."""
    return bind(WEIGHT_SCHEDULES, name, param="weight_schedule", owner=owner, settings=settings)

