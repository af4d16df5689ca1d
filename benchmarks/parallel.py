"""Parallel speed-up of the benchmark grid: the demo grid (8 methods × 4 shifts) with 1 worker, then 2 workers,
in one process, each into a fresh folder. Target: ≥ 1.8× with 2 workers on 2 cores.

    python benchmarks/parallel.py [n_seeds]     # default 3 seeds: the full demo grid (a few minutes each)
"""
from __future__ import annotations

import sys
import tempfile
import time

from adaptkit.bench.grid import run_grid

from _common import machine, table


def main() -> str:
    n_seeds = int(sys.argv[1]) if len(sys.argv) > 1 else 3
    seeds = list(range(n_seeds))
    walls = {}
    for workers in (1, 2):
        with tempfile.TemporaryDirectory() as d:
            t = time.perf_counter()
            result = run_grid("demo", out_dir=d, workers=workers, seeds=seeds, verbose=False)
            walls[workers] = time.perf_counter() - t
            n_cells = len(result.rows)
    out = (f"Parallel speed-up ({machine()}; demo grid, {n_cells} cells, seeds {seeds})\n\n"
           + table(["workers", "wall seconds", "speed-up"],
                   [[str(w), f"{walls[w]:.1f}", f"{walls[1] / walls[w]:.2f}"] for w in (1, 2)]))
    print(out)
    return out


if __name__ == "__main__":
    main()
