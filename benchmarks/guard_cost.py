"""Cost of the guard with ``weight=auto``: guarded fits with 3 and 5 candidate weights against one unguarded fit.

For each method and seed, three fits of ``adaptkit.fit`` on the same bundled shift run one after the other in
this process (interleaved, so machine noise hits every variant alike): the method as published (its default
weight, no guard), ``weight=auto, guard=True`` with the default candidate weights (``RunConfig.weight_candidates``,
multiples of the default weight) and with five (0.1, 0.3, 3, 30, 100 ×). Prints the wall-time ratios
guarded / unguarded as a Markdown table for benchmarks/RESULTS.md. Target (the trust issue): at most 3× with five
candidates.

    python benchmarks/guard_cost.py --shift rotated_moons --seeds 0,1,2
"""
from __future__ import annotations

import argparse
import statistics
import sys
import time
import warnings
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import machine, table  # noqa: E402

METHODS = ["dann", "confusion", "adr", "coral", "mmd"]  # the methods with a weight (ADDA has none)
def _candidates() -> dict:
    from adaptkit.config import RunConfig

    default = list(RunConfig().weight_candidates)
    return {f"{len(default)} candidates (default)": default, "5 candidates": [0.1, 0.3, 3.0, 30.0, 100.0]}


def _seconds(shift: str, method: str, seed: int, **kw) -> float:
    import adaptkit

    t0 = time.perf_counter()
    adaptkit.fit(shift, method=method, seed=seed, progress=False, device="cpu", **kw)
    return time.perf_counter() - t0


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--shift", default="rotated_moons")
    ap.add_argument("--seeds", default="0,1,2")
    ap.add_argument("--steps", type=int, default=1000)
    ap.add_argument("--methods", default=",".join(METHODS))
    a = ap.parse_args(argv)
    warnings.simplefilter("ignore")
    torch.set_num_threads(1)
    _seconds(a.shift, "source_only", 0, steps=50)  # warm-up: imports, first-call costs
    rows, candidates = [], _candidates()
    for m in a.methods.split(","):
        ratios = {k: [] for k in candidates}
        for seed in (int(s) for s in a.seeds.split(",")):
            base = _seconds(a.shift, m, seed, steps=a.steps)
            for k, cands in candidates.items():
                t = _seconds(a.shift, m, seed, steps=a.steps, weight="auto", guard=True, weight_candidates=cands)
                ratios[k].append(t / base)
        rows.append([m] + [f"{statistics.median(v):.2f}× (max {max(v):.2f}×)" for v in ratios.values()])
    print(f"Guard cost on {a.shift}, {a.steps} steps, seeds {a.seeds} ({machine()}); guarded / unguarded wall "
          "time of the same method and seed, median over seeds\n")
    print(table(["method"] + list(candidates), rows))


if __name__ == "__main__":
    main()
