"""Class weights fixed before training vs re-estimated during training vs none, next to source-only.

For every shift, method and seed, ``adaptkit.fit`` with the shift's bench recipe (``configs/bench.yaml``; the
breast-cancer split uses the selection-bias recipe) and the method's default options, once per
``class_weights`` setting:

- ``none``: unweighted alignment;
- ``estimated``: per-class ratios estimated once, before training, from the reference black box
  (:mod:`adaptkit.trust.reference`);
- ``reestimated``: equal weights at first, then re-estimated from the model at every evaluation
  (:mod:`adaptkit.trust.reweighting`; evaluations every ``steps / 10`` steps here).

Target accuracy is scored on the shift's held-out labelled target rows, which no run trains on. Results are cached
per run (JSON) in ``--out`` so that an interrupted run continues; prints a Markdown table for benchmarks/RESULTS.md.

    python benchmarks/class_weights.py --seeds 0,1,2,3,4 --jobs 2 --out /tmp/cw-bench
"""
from __future__ import annotations

import argparse
import json
import statistics
import sys
import warnings
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import machine, table  # noqa: E402

SHIFTS = {  # label -> (registered shift, options, recipe)
    "selection_bias": ("selection_bias", {}, "selection_bias"),
    "breast_cancer_by_radius": ("selection_bias", {"dataset": "breast_cancer", "feature": "mean radius",
                                                   "strength": 3.0}, "selection_bias"),
    "rotated_moons": ("rotated_moons", {}, "rotated_moons"),
    "shifted_blobs": ("shifted_blobs", {}, "shifted_blobs"),
    "corrupted_digits": ("corrupted_digits", {}, "corrupted_digits"),
}
SETTINGS = ["none", "estimated", "reestimated"]


def _recipe(name: str) -> dict:
    from omegaconf import OmegaConf

    from adaptkit.bench.config import compose_bench

    r = OmegaConf.to_container(compose_bench().recipes[name], resolve=True)
    encoder, head = dict(r["encoder"]), dict(r["head"])
    return dict(encoder=encoder.pop("name"), encoder_options=encoder, head=head.pop("name"), head_options=head,
                steps=r["steps"], batch_size=r["batch_size"], optim=r["optim"])


def _one(job) -> dict:
    import torch

    from adaptkit import fit

    shift, method, cw, seed, out = job
    path = Path(out) / f"{shift}-{method}-{cw}-{seed}.json"
    if path.exists():
        return json.loads(path.read_text())
    torch.set_num_threads(1)
    name, options, recipe = SHIFTS[shift]
    r = _recipe(recipe)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run = fit(name, data_options=options, method=method, seed=seed, progress=False, device="cpu",
                  class_weights=cw if method != "source_only" else "none", eval_every=max(1, r["steps"] // 10), **r)
    rec = {"shift": shift, "method": method, "class_weights": cw, "seed": seed,
           "target_accuracy": float(run.summary["target_accuracy"]),
           "ratios": (run.summary.get("class_weights") or {}).get("ratios")}
    path.write_text(json.dumps(rec))
    return rec


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", default="0,1,2,3,4")
    ap.add_argument("--shifts", default="selection_bias,breast_cancer_by_radius,rotated_moons,shifted_blobs")
    ap.add_argument("--methods", default="mmd,dann,coral")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--out", default="/tmp/cw-bench")
    a = ap.parse_args()
    Path(a.out).mkdir(parents=True, exist_ok=True)
    seeds = [int(s) for s in a.seeds.split(",")]
    shifts, methods = a.shifts.split(","), a.methods.split(",")
    jobs = [(s, "source_only", "none", k, a.out) for s in shifts for k in seeds]
    jobs += [(s, m, cw, k, a.out) for s in shifts for m in methods for cw in SETTINGS for k in seeds]
    with ProcessPoolExecutor(a.jobs) as pool:
        recs = list(pool.map(_one, jobs))
    acc = {}
    for r in recs:
        acc.setdefault((r["shift"], r["method"], r["class_weights"]), []).append(r["target_accuracy"])
    fmt = lambda xs: f"{statistics.mean(xs):.3f} ± {statistics.pstdev(xs):.3f}"  # noqa: E731
    rows = []
    for s in shifts:
        so = statistics.mean(acc[(s, "source_only", "none")])
        for m in methods:
            cells = [fmt(acc[(s, m, cw)]) + f" ({100 * (statistics.mean(acc[(s, m, cw)]) - so):+.1f})"
                     for cw in SETTINGS]
            rows.append([s, m, fmt(acc[(s, "source_only", "none")])] + cells)
    print(f"Machine: {machine()}; seeds {seeds}; target accuracy mean ± std (points vs source-only)\n")
    print(table(["shift", "method", "source-only"] + [f"class_weights={cw}" for cw in SETTINGS], rows))


if __name__ == "__main__":
    main()
