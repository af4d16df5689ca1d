"""Helpers shared by the benchmark scripts: a fixed small problem, interleaved timing, markdown tables."""
from __future__ import annotations

import platform
import statistics
import time
from typing import Callable, Dict, List

import torch


def machine() -> str:
    import os

    return (f"{platform.machine()} {platform.processor() or ''} {os.cpu_count()} cores, Python "
            f"{platform.python_version()}, torch {torch.__version__}, threads {torch.get_num_threads()}").strip()


def interleaved(fns: Dict[str, Callable[[], float]], repeats: int) -> Dict[str, List[float]]:
    """Call each timing function in turn, ``repeats`` rounds, so that machine noise hits every variant alike."""
    out: Dict[str, List[float]] = {k: [] for k in fns}
    for _ in range(repeats):
        for k, f in fns.items():
            out[k].append(f())
    return out


def median(xs: List[float]) -> float:
    return statistics.median(xs)


def table(header: List[str], rows: List[List[str]]) -> str:
    lines = ["| " + " | ".join(header) + " |", "| " + " | ".join("---" for _ in header) + " |"]
    lines += ["| " + " | ".join(r) + " |" for r in rows]
    return "\n".join(lines)


def timed(fn: Callable[[], None]) -> float:
    t = time.perf_counter()
    fn()
    return time.perf_counter() - t
