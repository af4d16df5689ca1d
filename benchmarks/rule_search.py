"""Search for a label-free selection rule with lower regret, on a selection study's ``results.csv``.

Reads the ``results.csv`` that ``adaptkit-study`` writes (one row per candidate), forms the groups with
:func:`adaptkit.bench.judge.group_rows` (the study's own grouping: (method, shift, seed), failed or diverged
candidates left out, candidates in the order of the file, which is the sweep's order), and prints for every rule
below its mean regret ± 95% t-interval (:func:`adaptkit.bench.stats.t_interval`), its worst single regret, and the
same split by seed and by shift. Target accuracy is used only to measure a pick (hindsight), never by a rule.

    python benchmarks/rule_search.py --results /tmp/study1/results.csv

Reference rows (not candidates of the search): every single score in its own direction, and the rules already in
:mod:`adaptkit.trust.rules` (``rank_agreement``, ``vetoed_info_max``), all through
:func:`adaptkit.trust.rules.choose`. The first two lines must reproduce benchmarks/SELECTION.md (info_max 4.6,
worst 28.6; rank_agreement 4.8, worst 54.8 on the 2026-12-03 study): that validates the grouping.

**Pre-registered families** (written before any of their results was looked at; nothing in them is tuned on
target accuracy; the only use of target accuracy is choosing one family among these eight). Ranks: rank 0 is the
best, each score in its own direction, ties share their mean rank (``scipy.stats.rankdata``), a missing score
ranks last; a score no candidate has is left out; remaining ties go to the earliest candidate.

1. ``agree_im_ent`` — mean rank over info_max and target_entropy, no veto: the two scores read from the target
   predictions alone; info_max was the best single score and entropy was good on corrupted_digits.
2. ``agree_im_iwcv`` — mean rank over info_max and iwcv, no veto: iwcv was strongest where info_max was weakest
   (selection_bias), so the two may cover each other's failures.
3. ``agree_all5`` — mean rank over the five scores that ranked in the right direction (info_max, dev, iwcv,
   source_val_accuracy, target_entropy), no veto: the broadest agreement, with no hand-picked subset.
4. ``median_rank`` — median rank over rank_agreement's four scores (info_max, dev, iwcv, source_val_accuracy),
   no veto: one score's outlying rank cannot move a median, it moves a mean.
5. ``worst_rank`` — the candidate whose worst rank over those four scores is best (minimax), ties broken by mean
   rank: keeps the candidate no score ranks badly, aimed at the worst case.
6. ``veto5_info_max`` — info_max among candidates whose source-validation accuracy is within 5 points of the
   group's best: the 2-point veto removed good digits candidates; a wider veto keeps only the protection
   against candidates that lost much of the source.
7. ``veto10_info_max`` — the same, within 10 points.
8. ``veto20_info_max`` — the same, within 20 points (only a gross loss of source knowledge is vetoed).

**Decision rule** (pre-registered): a family *beats info_max* when its mean regret is lower than info_max's on the
seed-0 groups AND on the seed-1 groups AND its worst single regret is lower than info_max's. Among families that do,
the one with the lowest mean regret over all groups (then the lower worst case) is the one to add to
adaptkit.trust.rules, to be judged again on a confirmatory study with new seeds (choosing the best of eight on the
same 48 groups flatters it). The project's target is a mean regret <= 2.2 points and a worst single regret < 15.
Outcome (benchmarks/SELECTION.md): agree_im_iwcv passed on the first study and failed on the confirmatory one.
"""
from __future__ import annotations

import argparse
import csv
import math
import re
import sys
from pathlib import Path
from typing import Callable, Dict, List, Mapping, Optional, Sequence

import numpy as np
from scipy.stats import rankdata

from adaptkit.bench.judge import group_rows
from adaptkit.bench.plan import Candidate, MethodEntry
from adaptkit.bench.stats import format_mean_ci, t_interval
from adaptkit.select import SCORES
from adaptkit.trust.rules import AGREEMENT_SCORES, choose, rule_names

TARGET_MEAN, TARGET_WORST = 2.2, 15.0  # the project's target, in points
FOUR = AGREEMENT_SCORES  # rank_agreement's scores
FIVE = (*AGREEMENT_SCORES, "target_entropy")

# --------------------------------------------------------------------------------------------------------------
# reading the study


def _number(text: str) -> Optional[float]:
    if text is None or text.strip() == "":
        return None
    v = float(text)
    return v if math.isfinite(v) else None


def _candidate(label: str) -> Candidate:
    """A sweep candidate rebuilt from its cell label ``dann__weight0.1__lr0.003`` (plan.expand_sweep writes the base
    label, then ``__<option><value>`` per swept option): base ``dann``, settings (weight, 0.1), (lr, 0.003)."""
    base, *parts = label.split("__")
    settings = []
    for p in parts:
        m = re.match(r"^([A-Za-z_]+?)([-+0-9.].*)$", p)
        settings.append((m.group(1), m.group(2)) if m else (p, ""))
    return Candidate(MethodEntry(base, label, {}), base, tuple(settings))


def read_groups(path: Path):
    with open(path, newline="") as f:
        raw = list(csv.DictReader(f))
    if not raw:
        raise ValueError(f"{path} holds no result rows.")
    scores = [c[len("score/"):] for c in raw[0] if c.startswith("score/") and c[len("score/"):] in SCORES]
    rows = []
    for r in raw:
        row = {"method": r["method"], "shift": r["shift"], "seed": int(r["seed"]), "status": r["status"],
               "target_accuracy": _number(r.get("target_accuracy"))}
        row.update({f"score/{s}": _number(r.get(f"score/{s}")) for s in scores})
        rows.append(row)
    labels = list(dict.fromkeys(r["method"] for r in rows))
    groups, counts = group_rows(rows, [_candidate(k) for k in labels], scores)
    return groups, counts, scores


# --------------------------------------------------------------------------------------------------------------
# the pre-registered families (see the module docstring); each maps candidates (score name -> value) to an index


def _values(cands: Sequence[Mapping], name: str) -> List[Optional[float]]:
    return [c.get(name) for c in cands]


def _rank_matrix(cands: Sequence[Mapping], names: Sequence[str]) -> Optional[np.ndarray]:
    """One row per present score: rank 0 = best, missing last, ties share their mean rank (scipy rankdata)."""
    rows = []
    for s in names:
        vals = _values(cands, s)
        if all(v is None for v in vals):
            continue
        sign = -1.0 if SCORES[s].higher_is_better else 1.0
        rows.append(rankdata([np.inf if v is None else sign * v for v in vals], method="average") - 1.0)
    return np.array(rows) if rows else None


def mean_rank(names: Sequence[str]) -> Callable:
    def rule(cands):
        r = _rank_matrix(cands, names)
        return None if r is None else int(np.argmin(r.mean(axis=0)))
    return rule


def median_rank(names: Sequence[str]) -> Callable:
    def rule(cands):
        r = _rank_matrix(cands, names)
        return None if r is None else int(np.argmin(np.median(r, axis=0)))
    return rule


def worst_rank(names: Sequence[str]) -> Callable:
    def rule(cands):
        r = _rank_matrix(cands, names)
        if r is None:
            return None
        worst, mean = r.max(axis=0), r.mean(axis=0)
        return int(np.lexsort((np.arange(len(cands)), mean, worst))[0])  # worst rank, then mean rank, then earliest
    return rule


def vetoed_info_max(width: float) -> Callable:
    def rule(cands):
        sva = _values(cands, "source_val_accuracy")
        known = [v for v in sva if v is not None]
        allowed = [True] * len(cands) if not known else [v is not None and v >= max(known) - width - 1e-12
                                                          for v in sva]
        best, best_value = None, -np.inf
        for i, c in enumerate(cands):
            v = c.get("info_max")
            if allowed[i] and v is not None and v > best_value:
                best, best_value = i, v
        return best
    return rule


FAMILIES: Dict[str, Callable] = {
    "agree_im_ent": mean_rank(("info_max", "target_entropy")),
    "agree_im_iwcv": mean_rank(("info_max", "iwcv")),
    "agree_all5": mean_rank(FIVE),
    "median_rank": median_rank(FOUR),
    "worst_rank": worst_rank(FOUR),
    "veto5_info_max": vetoed_info_max(0.05),
    "veto10_info_max": vetoed_info_max(0.10),
    "veto20_info_max": vetoed_info_max(0.20),
}


def references(scores: Sequence[str]) -> Dict[str, Callable]:
    """The single scores and the rules of adaptkit.trust.rules, through its choose (rule names as it spells them)."""
    out = {}
    for name in rule_names():
        base = name[len("vetoed_"):] if name.startswith("vetoed_") else name
        if base in SCORES and base not in scores:
            continue  # a score the study did not record
        if name.startswith("vetoed_") and name != "vetoed_info_max":
            continue
        out[name] = (lambda n: lambda cands: choose(cands, n))(name)
    return out


# --------------------------------------------------------------------------------------------------------------
# measuring


def regrets(groups, rule: Callable) -> List[Dict]:
    out = []
    for g in groups:
        cands = [{s: g.scores[s][i] for s in g.scores} for i in range(len(g.accuracies))]
        picked = rule(cands)
        best = max(g.accuracies)
        out.append({"shift": g.shift, "seed": g.seed, "method": g.method,
                    "regret": None if picked is None else 100.0 * round(best - g.accuracies[picked], 6)})
    return out


def _cell(values: Sequence[Optional[float]]) -> str:
    iv = t_interval([v for v in values if v is not None])
    return format_mean_ci(iv.mean, iv.half_width)


def _worst(values: Sequence[Optional[float]]) -> str:
    v = [x for x in values if x is not None]
    return f"{max(v):.1f}" if v else "n/a"


def main(argv: Optional[Sequence[str]] = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--results", type=Path, required=True, help="results.csv of an adaptkit-study run")
    args = p.parse_args(argv)
    groups, counts, scores = read_groups(args.results)
    seeds = sorted({g.seed for g in groups})
    shifts = list(dict.fromkeys(g.shift for g in groups))
    rules = {**{f"ref: {k}": v for k, v in references(scores).items()}, **FAMILIES}
    measured = {name: regrets(groups, fn) for name, fn in rules.items()}

    print(f"{len(groups)} groups from {args.results} ({counts['failed candidates']} failed or diverged candidates "
          f"left out, {counts['groups under two candidates']} groups under two candidates); seeds {seeds}; "
          f"regret in accuracy points, mean ± 95% t-interval over groups\n")
    head = (["rule", "mean regret", "worst"] + [f"seed {s}" for s in seeds] + [f"worst seed {s}" for s in seeds]
            + ["minus info_max, paired"])
    print("| " + " | ".join(head) + " |\n|" + " --- |" * len(head))
    base = measured.get("ref: info_max")
    for name, recs in measured.items():
        r = [x["regret"] for x in recs]
        by_seed = [[x["regret"] for x in recs if x["seed"] == s] for s in seeds]
        missing = sum(v is None for v in r)
        paired = "n/a" if base is None else _cell([None if a["regret"] is None or b["regret"] is None
                                                   else a["regret"] - b["regret"] for a, b in zip(recs, base)])
        print("| " + " | ".join([name + (f" ({missing} missing)" if missing else ""), _cell(r), _worst(r)]
                                + [_cell(v) for v in by_seed] + [_worst(v) for v in by_seed] + [paired]) + " |")
    # the family adaptkit.trust.rules adopted (as info_iwcv_agreement) must pick exactly what the family picked
    if "ref: info_iwcv_agreement" in measured:
        same = [a["regret"] for a in measured["ref: info_iwcv_agreement"]] == [a["regret"]
                                                                              for a in measured["agree_im_iwcv"]]
        print(f"\nrules.info_iwcv_agreement picks as the family agree_im_iwcv does in every group: {same}")
    print("\nPer shift (mean regret ± 95% CI; worst)\n")
    print("| rule | " + " | ".join(shifts) + " |\n|" + " --- |" * (len(shifts) + 1))
    for name, recs in measured.items():
        cells = []
        for sh in shifts:
            v = [x["regret"] for x in recs if x["shift"] == sh]
            cells.append(f"{_cell(v)}; {_worst(v)}")
        print(f"| {name} | " + " | ".join(cells) + " |")

    # the pre-registered decision: beats info_max on both seed halves and in the worst case
    ref = measured.get("ref: info_max")
    if ref is None:
        print("\nNo info_max column: no decision.")
        return 0

    def stats(recs, seed=None):
        v = [x["regret"] for x in recs if x["regret"] is not None and (seed is None or x["seed"] == seed)]
        return (float(np.mean(v)) if v else math.inf), (max(v) if v else math.inf)

    base_mean, base_worst = stats(ref)
    winners = []
    print(f"\nDecision (pre-registered): beats info_max (mean {base_mean:.2f}, worst {base_worst:.1f}) on every "
          f"seed half and in the worst case")
    for name in FAMILIES:
        recs = measured[name]
        halves = [stats(recs, s)[0] < stats(ref, s)[0] for s in seeds]
        mean, worst = stats(recs)
        ok = all(halves) and worst < base_worst
        print(f"  {name}: mean {mean:.2f}, worst {worst:.1f}; lower mean on seeds "
              f"{[s for s, h in zip(seeds, halves) if h]}; lower worst: {worst < base_worst} -> "
              f"{'BEATS' if ok else 'does not beat'} info_max")
        if ok:
            winners.append((mean, worst, name))
    if winners:
        mean, worst, name = min(winners)
        met = mean <= TARGET_MEAN and worst < TARGET_WORST
        print(f"Chosen family: {name} (mean {mean:.2f}, worst {worst:.1f}); project target (mean <= "
              f"{TARGET_MEAN}, worst < {TARGET_WORST}) {'met' if met else 'NOT met'}.")
    else:
        print("No family beats info_max on both seed halves and in the worst case.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
