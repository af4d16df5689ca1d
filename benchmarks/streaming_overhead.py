"""Streaming path overhead on data already in memory: a DatasetPair run's step time over a DomainPair run's.

The same rotated-moons arrays train the same method twice per round — once as a `DomainPair` (tensors indexed on
the device), once as a `DatasetPair` of `TensorDataset`s through a `DataLoader` (`loader_workers=0` and, when
asked, more) — interleaved over several rounds so that machine noise hits every variant alike. The two runs draw
the same batches and end with the same weights (tests/data/test_streaming.py), so only the time differs. Training
time is the loop's own `wall_seconds` (evaluations included, the same for both); the ratio of medians is printed
as a Markdown table for benchmarks/RESULTS.md. Issue target: at most 1.10×.

    python benchmarks/streaming_overhead.py --repeats 7 --workers 0,2
"""
from __future__ import annotations

import argparse
import statistics
import sys
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import interleaved, machine, table  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--steps", type=int, default=300)
    ap.add_argument("--methods", default="source_only,dann,mmd")
    ap.add_argument("--workers", default="0")
    a = ap.parse_args()

    import torch
    from torch.utils.data import TensorDataset

    from adaptkit import DatasetPair, fit
    from adaptkit.data import make_shift

    torch.set_num_threads(1)
    pair = make_shift("rotated_moons", n_source=2000, n_target=2000, seed=0)
    test = pair.scoring_sets()["target_test"]
    streamed = DatasetPair(TensorDataset(pair.source_train.x, pair.source_train.y), TensorDataset(pair.target_train_x),
                           source_val=TensorDataset(pair.source_val.x, pair.source_val.y),
                           target_test=TensorDataset(test.x, test.y), n_classes=pair.n_classes, name=pair.name)
    workers = [int(w) for w in a.workers.split(",")]
    kw = dict(steps=a.steps, batch_size=64, eval_every=a.steps // 3, seed=0, progress=False, device="cpu",
              diagnostics=False)

    def timer(data, method, **more):
        def run() -> float:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                return float(fit(data, method=method, **kw, **more).summary["wall_seconds"])
        return run

    rows = []
    for method in a.methods.split(","):
        fns = {"in memory": timer(pair, method)}
        fns.update({f"streaming, {w} workers": timer(streamed, method, loader_workers=w) for w in workers})
        times = interleaved(fns, a.repeats)
        base = statistics.median(times["in memory"])
        rows.append([method, f"{1000 * base / a.steps:.2f}"]
                    + [f"{statistics.median(times[k]) / base:.2f}×" for k in fns if k != "in memory"])
    print(f"Machine: {machine()}; {a.steps} steps, batch 64, moons 2000 + 2000 rows, median of {a.repeats} "
          "interleaved rounds\n")
    print(table(["method", "in memory (ms/step)"] + [f"streaming, {w} workers / in memory" for w in workers], rows))


if __name__ == "__main__":
    main()
