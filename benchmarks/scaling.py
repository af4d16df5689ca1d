"""Scaling: time of one forward+backward of each MMD estimator against batch size (quadratic vs linear-time), of
the CORAL distance against feature size, and the peak memory of a digits training run.

Times are medians of interleaved repeats in one process; the quadratic/linear ratio is the figure to read (the
machines are shared and noisy). Run: ``python benchmarks/scaling.py``
"""
from __future__ import annotations

import json
import subprocess
import sys
import time

import torch

from adaptkit.losses import coral_distance, mmd2

from _common import interleaved, machine, median, table

REPEATS = 9


def _fb(fn, a, b):
    def go():
        x, y = a.clone().requires_grad_(True), b.clone().requires_grad_(True)
        t = time.perf_counter()
        fn(x, y).backward()
        return time.perf_counter() - t
    return go


def mmd_scaling() -> str:
    rows = []
    g = torch.Generator().manual_seed(0)
    for n in (64, 128, 256, 512, 1024, 2048):
        a, b = torch.randn(n, 64, generator=g), torch.randn(n, 64, generator=g) + 0.5
        fns = {est: _fb(lambda x, y, est=est: mmd2(x, y, estimator=est), a, b) for est in ("biased", "unbiased", "linear")}
        for f in fns.values():
            f()
        r = {k: median(v) for k, v in interleaved(fns, REPEATS).items()}
        rows.append([str(n), *(f"{r[k] * 1e3:.2f}" for k in ("biased", "unbiased", "linear")),
                     f"{r['unbiased'] / r['linear']:.1f}"])
    return ("MMD² forward+backward, 64-d features, 5 Gaussian kernels (ms; median of "
            f"{REPEATS} interleaved repeats)\n\n"
            + table(["batch per domain", "biased", "unbiased", "linear-time", "unbiased / linear"], rows))


def coral_scaling() -> str:
    rows = []
    g = torch.Generator().manual_seed(0)
    for d in (16, 64, 256, 1024):
        a, b = torch.randn(256, d, generator=g), torch.randn(256, d, generator=g) * 1.5
        fns = {"coral": _fb(coral_distance, a, b)}
        fns["coral"]()
        r = median(interleaved(fns, REPEATS)["coral"])
        rows.append([str(d), f"{r * 1e3:.2f}"])
    return (f"CORAL distance forward+backward, batch 256 per domain (ms; median of {REPEATS} repeats)\n\n"
            + table(["feature size d", "ms"], rows))


PEAK = r"""
import json, sys, torch
torch.set_num_threads(1)
import adaptkit
from adaptkit.data.shifts import make_shift

def status(key):  # kB, from the kernel's accounting of this process (Linux)
    return int(open("/proc/self/status").read().split(key + ":")[1].split()[0])

pair = make_shift("corrupted_digits", seed=0)
base = status("VmRSS")
open("/proc/self/clear_refs", "w").write("5")  # reset the peak (VmHWM) to the current size
adaptkit.fit(pair, method=sys.argv[1], encoder="small_cnn", head="mlp", steps=200, batch_size=64, progress=False,
             device="cpu")
print(json.dumps({"before_kib": base, "peak_kib": status("VmHWM")}))
"""


def peak_memory() -> str:
    rows = []
    for method in ("source_only", "dann", "adda", "adr", "mmd"):
        out = subprocess.run([sys.executable, "-c", PEAK, method], capture_output=True, text=True, check=True)
        r = json.loads(out.stdout.strip().splitlines()[-1])
        rows.append([method, f"{r['before_kib'] / 1024:.0f}", f"{r['peak_kib'] / 1024:.0f}",
                     f"{(r['peak_kib'] - r['before_kib']) / 1024:.1f}"])
    return ("Peak resident memory of a corrupted_digits training run (small_cnn, batch 64, 200 steps; MiB, a fresh "
            "process; the peak is reset after imports and data, so 'training adds' is what fit() itself needs)\n\n"
            + table(["method", "before fit (imports + data)", "peak during fit", "training adds"], rows))


def main() -> str:
    torch.set_num_threads(1)
    out = f"Machine: {machine()}\n\n" + "\n\n".join([mmd_scaling(), coral_scaling(), peak_memory()])
    print(out)
    return out


if __name__ == "__main__":
    main()
