"""Choosing the default options that are ours (not the papers') so that no method collapses with defaults.

The trust issue's item 5: with every face's defaults, no method on any bundled shift should end below chance or
more than 10 points below source-only. Only options that no paper states are candidates here (the weights of
domain confusion, ADR, Deep CORAL and MMD, and the schedule of the non-DANN weights: see each method's
``Options``); DANN's, CDAN's and MCD's weights and schedules are the papers' and are left alone. A second study
(``--methods self_training``) covers self-training's threshold, weight and class balance, also ours.

Every candidate is trained with the bench recipes (``configs/bench.yaml``) on the four bundled shifts with the
**tuning seeds** (default 100, 101, 102; never the test seeds 0-4 of benchmarks/RESULTS.md), through
``adaptkit-bench``. Per method the rule (ours) keeps the candidate with the highest mean gain over source-only
across the shifts among those whose worst shift loses at most ``--margin`` points (default 5, half the target's
10, to leave room for seed noise) and that stay above chance everywhere; if none qualifies, the default
stays. (The first pass's rule took the candidate with the best worst shift instead; for CORAL, the only method
where nothing qualified, that was weight 10, still 10.9 points below on the selection-biased table and 7 below on
moons, so the rule was changed after seeing it, as benchmarks/RESULTS.md says.) Prints a Markdown table for benchmarks/RESULTS.md.

    python benchmarks/defaults.py --out /tmp/defaults-tune            # 3 tuning seeds, about 15 min on 2 cores
"""
from __future__ import annotations

import argparse
import csv
import statistics
import sys
from collections import defaultdict
from pathlib import Path

SHIFTS = ["rotated_moons", "shifted_blobs", "corrupted_digits", "selection_bias"]
CHANCE = {"rotated_moons": 1 / 2, "shifted_blobs": 1 / 3, "corrupted_digits": 1 / 10, "selection_bias": 1 / 3}
RAMP = "dann_ramp"

# method -> list of option dicts; the first entry of each list is the default before this study
CANDIDATES = {
    "confusion": [{"weight": w, "weight_schedule": s} for s in ("constant", RAMP) for w in (1.0, 0.3, 0.1, 0.03)],
    "adr": [{"weight": w} for w in (0.1, 0.03, 0.01, 0.003)],
    # 30 and 10 were added after a first pass in which no weight from 3000 down to 100 qualified
    "coral": [{"weight": w, "weight_schedule": s} for s in ("constant", RAMP)
              for w in (3000.0, 1000.0, 300.0, 100.0, 30.0, 10.0)],
    "mmd": [{"weight": w, "weight_schedule": s} for s in ("constant", RAMP) for w in (1.0, 0.3, 0.1, 0.03)],
    # added in a second study (--methods self_training): its threshold 0.9 and weight 1 are ours; class balance
    # (CBST) and a stricter threshold are the usual guards against confident wrong pseudo-labels
    "self_training": [{"weight": w, "threshold": t, "class_balanced": b}
                      for b in (False, True) for t in (0.9, 0.95) for w in (1.0, 0.3)],
}


def label(method: str, options: dict) -> str:
    w = options["weight"]
    tag = f"{method}_w{w:g}"
    if options.get("weight_schedule") == RAMP:
        tag += "_ramp"
    if "threshold" in options:
        tag += f"_t{options['threshold']:g}"
    if options.get("class_balanced"):
        tag += "_balanced"
    return tag.replace(".", "p")


def entries(methods) -> list:
    out = ["source_only"]
    for method in methods:
        for o in CANDIDATES[method]:
            opts = ", ".join(f"{k}: {str(v).lower() if isinstance(v, bool) else v}" for k, v in o.items())
            out.append(f"{{name: {method}, label: {label(method, o)}, options: {{{opts}}}}}")
    return out


def run(out: Path, seeds: list, workers: int, methods) -> Path:
    from adaptkit.cli import bench_main

    argv = [f"methods=[{', '.join(entries(methods))}]", f"shifts=[{','.join(SHIFTS)}]",
            f"seeds=[{','.join(map(str, seeds))}]", f"workers={workers}", f"out_dir={out}", "verbose=false"]
    old = sys.argv
    sys.argv = ["adaptkit-bench", *argv]
    try:
        bench_main()
    except SystemExit as e:
        if e.code not in (0, None):
            raise
    finally:
        sys.argv = old
    return out / "results.csv"


def read(path: Path) -> dict:
    acc = defaultdict(list)  # (label, shift) -> accuracies
    with open(path, newline="", encoding="utf-8") as f:
        for r in csv.DictReader(f):
            if r["status"] == "ok" and r["target_accuracy"]:
                acc[(r["method"], r["shift"])].append(float(r["target_accuracy"]))
    return acc


def choose(acc: dict, margin: float, methods) -> tuple:
    so = {s: statistics.mean(acc[("source_only", s)]) for s in SHIFTS}
    lines, chosen = [], {}
    for method in methods:
        cands = CANDIDATES[method]
        scored = []
        for o in cands:
            lab = label(method, o)
            means = {s: statistics.mean(acc[(lab, s)]) if acc.get((lab, s)) else float("nan") for s in SHIFTS}
            gains = {s: 100 * (means[s] - so[s]) for s in SHIFTS}
            worst, mean = min(gains.values()), statistics.mean(gains.values())
            above = all(means[s] > CHANCE[s] for s in SHIFTS)
            scored.append((o, lab, gains, worst, mean, above))
        ok = [c for c in scored if c[3] >= -margin and c[5]]
        best = max(ok, key=lambda c: c[4]) if ok else scored[0]
        chosen[method] = best[0]
        for o, lab, gains, worst, mean, above in scored:
            mark = " **chosen**" if o is best[0] else (" (the default before)" if o is cands[0] else "")
            cells = " | ".join(f"{gains[s]:+.1f}" for s in SHIFTS)
            lines.append(f"| {method} | {_opts(o)}{mark} | {cells} | {mean:+.1f} | {worst:+.1f} |")
    head = ["| method | options | " + " | ".join(SHIFTS) + " | mean | worst |",
            "| --- | --- | " + " | ".join("---" for _ in SHIFTS) + " | --- | --- |"]
    so_line = "source-only target accuracy: " + ", ".join(f"{s} {so[s]:.3f}" for s in SHIFTS)
    return "\n".join([so_line, "", *head, *lines]), chosen


def _opts(o: dict) -> str:
    return ", ".join(f"{k} {v:g}" if isinstance(v, float) else f"{k} {v}" for k, v in o.items())


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=Path("/tmp/defaults-tune"))
    ap.add_argument("--seeds", default="100,101,102")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--margin", type=float, default=5.0, help="largest loss in points allowed on any shift")
    ap.add_argument("--report-only", action="store_true", help="read an existing results.csv, train nothing")
    ap.add_argument("--methods", default="confusion,adr,coral,mmd",
                    help=f"comma-separated, of {', '.join(CANDIDATES)} (default: the first study's four)")
    a = ap.parse_args()
    seeds = [int(s) for s in a.seeds.split(",")]
    methods = a.methods.split(",")
    unknown = [m for m in methods if m not in CANDIDATES]
    if unknown:
        ap.error(f"--methods {','.join(unknown)}: no candidates for that method; accepted: {', '.join(CANDIDATES)}")
    path = a.out / "results.csv" if a.report_only else run(a.out, seeds, a.workers, methods)
    text, chosen = choose(read(path), a.margin, methods)
    print(f"Tuning seeds {seeds}; points against source-only, mean over seeds; rule: best mean gain with every "
          f"shift >= -{a.margin:g} and above chance, else the default before.\n")
    print(text)
    print("\nchosen:", chosen)


if __name__ == "__main__":
    main()
