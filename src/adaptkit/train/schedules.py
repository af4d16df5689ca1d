"""Schedules: a factor as a function of progress ``p`` in [0, 1] through a training stage.

Used for learning rates (``optim.schedule``) and for alignment weights (each method's ``weight_schedule``).
"""
from __future__ import annotations

import math
from typing import Callable, Dict

from .._checks import check_choice


def constant(p: float) -> float:
    return 1.0


def dann_ramp(p: float, gamma: float = 10.0) -> float:
    """λ_p = 2 / (1 + exp(−γ·p)) − 1, rising from 0 to ≈1 (Ganin et al., JMLR 2016, §5.2.2; γ = 10)."""
    return 2.0 / (1.0 + math.exp(-gamma * p)) - 1.0


def dann_anneal(p: float, alpha: float = 10.0, beta: float = 0.75) -> float:
    """Learning-rate factor 1 / (1 + α·p)^β (Ganin et al., JMLR 2016, §5.2.2; α = 10, β = 0.75)."""
    return 1.0 / (1.0 + alpha * p) ** beta


def cosine(p: float) -> float:
    """Cosine decay from 1 to 0 (Loshchilov & Hutter, ICLR 2017, without restarts)."""
    return 0.5 * (1.0 + math.cos(math.pi * min(max(p, 0.0), 1.0)))


SCHEDULES: Dict[str, Callable[[float], float]] = {
    "constant": constant, "dann_ramp": dann_ramp, "dann_anneal": dann_anneal, "cosine": cosine,
}


def get_schedule(name: str, owner: str = "schedule") -> Callable[[float], float]:
    check_choice("schedule", owner, name, sorted(SCHEDULES))
    return SCHEDULES[name]
