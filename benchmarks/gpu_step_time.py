"""Step time per method on the CPU and on a CUDA GPU (float32 and bf16 autocast), measured side by side in one run.

Each variant is one of adaptkit's own trainers (``run.prepare`` of a ``RunConfig``: the library's model, method,
batches and loop, evaluation left out), stepped ``--steps`` times per repeat after a warm-up; the variants are
timed in turn, ``--repeats`` rounds (interleaved, so machine noise hits each alike), and the table gives the median
milliseconds per step and the CPU/GPU ratios of medians. GPU timings synchronise the device before reading the
clock. Problems: ``digits`` (the bundled corrupted digits, 8×8, the small CNN) and ``images32`` (3×32×32 random
images with a class signal, ResNet-18 with random weights: the size where a GPU starts to matter).

Without a CUDA device it prints one line, ``no CUDA device: skipped``, and exits 0.

    python benchmarks/gpu_step_time.py                      # every method, both problems
    python benchmarks/gpu_step_time.py --methods dann,mmd --problems images32 --batch 128
"""
from __future__ import annotations

import argparse
import dataclasses
import sys
import time
from pathlib import Path
from typing import Callable, Dict, List

import torch

sys.path.insert(0, str(Path(__file__).parent))

from _common import interleaved, machine, median, table  # noqa: E402

METHODS = ["source_only", "dann", "confusion", "coral", "mmd", "cdan", "mcd", "adr", "adda", "self_training"]


def images32(seed: int = 0, n: int = 2048):
    """Two domains of 3×32×32 images whose class is a brightness pattern, the target darker and noisier (a timing
    problem only: its accuracy means nothing)."""
    from adaptkit.data.pair import DomainPair

    g = torch.Generator().manual_seed(seed)
    y_s, y_t = torch.randint(0, 10, (n,), generator=g), torch.randint(0, 10, (n,), generator=g)
    pattern = torch.randn(10, 3, 32, 32, generator=g)
    x_s = pattern[y_s] + 0.5 * torch.randn(n, 3, 32, 32, generator=g)
    x_t = 0.7 * pattern[y_t] + 0.8 * torch.randn(n, 3, 32, 32, generator=g)
    return DomainPair(x_s, y_s, x_t, y_t, name="images32")


def stepper(method: str, problem: str, device: str, precision: str, batch: int, steps: int) -> Callable[[], float]:
    """A function that runs ``steps`` training steps of a fresh trainer and returns the seconds per step."""
    from adaptkit.config import RunConfig, resolve
    from adaptkit.run import prepare

    if problem == "digits":
        c = RunConfig(method=method, data="corrupted_digits", encoder="small_cnn", batch_size=batch)
        parts = {}
    else:
        c = RunConfig(method=method, data="rotated_moons", encoder={"name": "resnet18"}, batch_size=batch)
        parts = {"data": images32()}
    c = dataclasses.replace(c, steps=10_000, eval_every=10_000, device=device, precision=precision, progress=False,
                            diagnostics=False)
    p = prepare(resolve(c, parts), parts)
    tr = p.trainer
    sync = torch.cuda.synchronize if device.startswith("cuda") else (lambda: None)

    def run_steps(k: int) -> None:
        for _ in range(k):
            tr._enter_stage_for(tr.step)
            tr._step()
            tr.step += 1

    run_steps(3)  # warm-up: kernels chosen, allocator filled
    sync()

    def timed() -> float:
        sync()
        t = time.perf_counter()
        run_steps(steps)
        sync()
        return (time.perf_counter() - t) / steps

    return timed


def main(argv: List[str] = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--methods", default=",".join(METHODS))
    ap.add_argument("--problems", default="digits,images32")
    ap.add_argument("--batch", type=int, default=64)
    ap.add_argument("--steps", type=int, default=10, help="steps per timed repeat")
    ap.add_argument("--repeats", type=int, default=5)
    args = ap.parse_args(argv)
    if not torch.cuda.is_available():
        print("no CUDA device: skipped")
        return 0
    gpu = torch.cuda.get_device_name(0)
    print(f"Machine: {machine()}; GPU: {gpu}; batch {args.batch} per domain, median of {args.repeats} repeats "
          f"of {args.steps} steps, variants interleaved.\n")
    rows = []
    for problem in args.problems.split(","):
        for method in args.methods.split(","):
            fns: Dict[str, Callable[[], float]] = {
                "cpu": stepper(method, problem, "cpu", "float32", args.batch, args.steps),
                "gpu": stepper(method, problem, "cuda", "float32", args.batch, args.steps),
                "gpu_bf16": stepper(method, problem, "cuda", "bf16", args.batch, args.steps),
            }
            t = {k: median(v) for k, v in interleaved(fns, args.repeats).items()}
            rows.append([problem, method, f"{1e3 * t['cpu']:.2f}", f"{1e3 * t['gpu']:.2f}",
                         f"{1e3 * t['gpu_bf16']:.2f}", f"{t['cpu'] / t['gpu']:.1f}", f"{t['cpu'] / t['gpu_bf16']:.1f}"])
            print(" ".join(rows[-1]), file=sys.stderr, flush=True)
    print(table(["problem", "method", "CPU ms/step", "GPU ms/step", "GPU bf16 ms/step", "CPU/GPU",
                 "CPU/GPU bf16"], rows))
    return 0


if __name__ == "__main__":
    sys.exit(main())
