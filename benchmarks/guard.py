"""Guarded vs unguarded vs source-only: the default AlignedClassifier on every bundled shift, over several seeds.

For every shift, seed and method, three fits of ``AlignedClassifier`` on the same arrays (labelled source rows,
unlabelled target rows with y = -1), scored on the shift's held-out labelled target test rows (never seen by a
fit):

- ``source_only``: ``method="source_only", guard=False``;
- ``unguarded``: the method with its default weight, ``guard=False`` (the method as published, this face's
  other settings);
- ``guarded``: the estimator's defaults (``weight="auto", guard=True``).

The unguarded and the guarded fit of one cell run one after the other in the same worker, so their wall-clock
ratio is the guard's cost measured side by side. Results are cached per cell (JSON) in ``--out`` so that an
interrupted run continues. Prints Markdown tables for benchmarks/RESULTS.md.

    python benchmarks/guard.py --seeds 0,1,2,3,4 --jobs 2 --out /tmp/guard-bench
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import machine, table  # noqa: E402

SHIFTS = {  # label -> (registered shift, options); the breast-cancer split is the label-shift case of the issue
    "rotated_moons": ("rotated_moons", {}),
    "shifted_blobs": ("shifted_blobs", {}),
    "corrupted_digits": ("corrupted_digits", {}),
    "selection_bias": ("selection_bias", {}),
    "breast_cancer_by_radius": ("selection_bias", {"dataset": "breast_cancer", "feature": "mean radius",
                                                   "strength": 3.0}),
}
METHODS = ["dann", "confusion", "adda", "adr", "coral", "mmd"]


def _arrays(shift: str, seed: int):
    from adaptkit.data import make_shift

    name, options = SHIFTS[shift]
    pair = make_shift(name, seed=seed, **options)
    xs = np.concatenate([pair.source_train.x.numpy(), pair.source_val.x.numpy()])
    ys = np.concatenate([pair.source_train.y.numpy(), pair.source_val.y.numpy()])
    xt = pair.target_train_x.numpy()
    test = pair.scoring_sets()["target_test"]
    X = np.concatenate([xs, xt]).astype(np.float32)
    y = np.concatenate([ys, np.full(len(xt), -1)])
    return X, y, test.x.numpy().astype(np.float32), test.y.numpy()


def _fit(X, y, Xt, yt, seed, **kw):
    import torch

    from adaptkit import AlignedClassifier

    torch.set_num_threads(1)
    t0 = time.perf_counter()
    clf = AlignedClassifier(random_state=seed, device="cpu", **kw).fit(X, y)
    seconds = time.perf_counter() - t0
    out = {"accuracy": float((clf.predict(Xt) == yt).mean()), "seconds": seconds}
    trust = clf.summary_.get("trust")
    if trust is not None:
        out["kept"] = trust.get("kept")
        out["decision"] = clf.summary_.get("decision")
        out["class_weights"] = trust.get("class_weights")
    return out


def cell(out_dir: str, shift: str, seed: int, method: str, candidates=None, vote=None, choose_by=None) -> dict:
    path = Path(out_dir) / f"{shift}__{method}__{seed}.json"
    if path.exists():
        return json.loads(path.read_text())
    warnings.simplefilter("ignore")
    if vote is not None:  # a design comparison: the guard's voting scores (read by adaptkit.trust.candidates)
        import adaptkit.trust.guard as guard

        guard.VOTING_SCORES = tuple(vote)
    X, y, Xt, yt = _arrays(shift, seed)
    if method == "source_only":
        rec = {"source_only": _fit(X, y, Xt, yt, seed, method="source_only", guard=False)}
    else:
        rec = {"unguarded": _fit(X, y, Xt, yt, seed, method=method, weight=None, guard=False),
               "guarded": _fit(X, y, Xt, yt, seed, method=method, weight_candidates=candidates, choose_by=choose_by)}
    rec.update(shift=shift, seed=seed, method=method)
    tmp = path.with_suffix(".tmp")
    tmp.write_text(json.dumps(rec))
    os.replace(tmp, path)
    return rec


def report(records, seeds) -> str:
    so = {(r["shift"], r["seed"]): r["source_only"]["accuracy"] for r in records if r["method"] == "source_only"}
    rows, gaps, ratios = [], [], []
    for shift in SHIFTS:
        for m in METHODS:
            rs = [r for r in records if r["shift"] == shift and r["method"] == m and (shift, r["seed"]) in so]
            if not rs:
                continue
            base = np.mean([so[(shift, r["seed"])] for r in rs])
            ung = np.mean([r["unguarded"]["accuracy"] for r in rs])
            gua = np.mean([r["guarded"]["accuracy"] for r in rs])
            kept = sum(r["guarded"].get("kept") not in (None, "source_only") for r in rs)
            worst = min(r["guarded"]["accuracy"] - so[(shift, r["seed"])] for r in rs)
            gaps.append((shift, m, gua - base, ung - base))
            ratios += [r["guarded"]["seconds"] / r["unguarded"]["seconds"] for r in rs]
            rows.append([shift, m, f"{base:.3f}", f"{ung:.3f} ({100 * (ung - base):+.1f})",
                         f"{gua:.3f} ({100 * (gua - base):+.1f})", f"{100 * worst:+.1f}", f"{kept}/{len(rs)}"])
    text = [f"Machine: {machine()}. Seeds {seeds}. Target accuracy on the held-out labelled target test rows "
            "(mean over seeds; in brackets: points against source-only).", "",
            table(["shift", "method", "source-only", "unguarded (default weight)", "guarded (estimator default)",
                   "guarded worst seed vs source-only (pts)", "adaptation kept"], rows), ""]
    if gaps:
        g = np.array([x[2] for x in gaps])
        u = np.array([x[3] for x in gaps])
        w = min(gaps, key=lambda x: x[2])
        text.append(f"Guarded vs source-only over {len(gaps)} shift×method rows: mean {100 * g.mean():+.1f} points, "
                    f"worst row {100 * g.min():+.1f} ({w[0]}, {w[1]}), rows more than 2 points below: "
                    f"{int((g < -0.02).sum())}. Unguarded: mean {100 * u.mean():+.1f}, worst {100 * u.min():+.1f}, "
                    f"rows more than 2 points below: {int((u < -0.02).sum())}, more than 10 below: "
                    f"{int((u < -0.10).sum())}.")
        text.append(f"Cost of the guard (guarded / unguarded wall time of the same cell, side by side): median "
                    f"{np.median(ratios):.2f}×, max {np.max(ratios):.2f}× over {len(ratios)} cells.")
    return "\n".join(text)


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", default="0,1,2,3,4")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--out", default="guard-bench")
    ap.add_argument("--shifts", default=",".join(SHIFTS))
    ap.add_argument("--candidates", default=None, help="weight_candidates of the guarded fit, e.g. 0.3,1,3 "
                    "(default: the estimator's)")
    ap.add_argument("--methods", default=",".join(METHODS))
    ap.add_argument("--choose-by", default=None, help="the selection rule among the candidates (default: the "
                    "estimator's)")
    ap.add_argument("--vote", default=None, help="the guard's voting scores, e.g. info_max,iwcv (default: "
                    "adaptkit.trust.guard.VOTING_SCORES)")
    a = ap.parse_args(argv)
    seeds = [int(s) for s in a.seeds.split(",")]
    Path(a.out).mkdir(parents=True, exist_ok=True)
    tasks = [(s, seed, m) for s in a.shifts.split(",") for seed in seeds for m in ["source_only"] + a.methods.split(",")]
    from joblib import Parallel, delayed

    candidates = None if a.candidates is None else [float(v) for v in a.candidates.split(",")]
    vote = None if a.vote is None else a.vote.split(",")
    records = Parallel(n_jobs=a.jobs, verbose=5)(delayed(cell)(a.out, *t, candidates, vote, a.choose_by)
                                                     for t in tasks)
    print(report(records, seeds))


if __name__ == "__main__":
    main()
