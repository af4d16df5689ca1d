"""Judging label-free selection scores: pure functions over plain numbers (no files, no training).

**Question.** After a sweep you hold several trained candidates of one method and no target labels. Each score of
:data:`adaptkit.select.SCORES` ranks them; how much target accuracy do you lose by trusting it?

**Groups and numbers.** A *group* is one (method, shift, seed): the candidates of one method trained on the same
data draw with the same seed (:func:`group_rows`). Candidates that failed or diverged are left out (and counted).
For each group with at least two finished candidates and each score (:func:`judge`):

* *picked*: the candidate :func:`adaptkit.select.pick_best` ranks best, in the score's own direction; a candidate
  without a value for the score is never picked (a group where no candidate has one is *missing* for that score).
  Ties go to the earliest candidate of the sweep; since source-validation accuracy often saturates at 100%, ties
  are counted, and the expected regret under a random tie-break is reported beside the plain one;
* *best*: the highest target accuracy among the group's finished candidates, known only in hindsight;
* *regret* = best − picked target accuracy (reported in accuracy points; 0 when the score picked the best);
* *Spearman ρ* between the score and target accuracy over the scored candidates (``scipy.stats.spearmanr``),
  **oriented** by the score's direction: +1 means the score orders the candidates exactly as target accuracy does,
  whichever way the score points (for a lower-is-better score this is ρ(−score, accuracy) = −ρ(score, accuracy));
  ``None`` with fewer than two scored candidates or when score or accuracy is constant over them.

Per score (:func:`summarise`): mean regret ± 95% Student-t interval over groups (:func:`adaptkit.bench.stats.
t_interval`), mean ρ, and the share of groups where it picked a best candidate. Two reference rows give the scale:
``random pick`` (the expected regret of a uniformly random candidate, best − mean, and the expected share of best
picks) and ``oracle`` (picks with target labels: regret 0).

Example:
    >>> c = judge([0.9, 0.7, 0.8], [0.3, 0.1, 0.2], "snd")   # snd: higher is better
    >>> c.picked, round(c.regret, 6), c.spearman
    (0, 0.0, 1.0)
"""
from __future__ import annotations

import math
import numbers
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Dict, List, Mapping, Optional, Sequence, Tuple

from .plan import Candidate
from .stats import Interval, t_interval

__all__ = ["RANDOM", "ORACLE", "RULES", "RULE_PREFIX", "judge_rule", "Choice", "Group", "ScoreSummary", "StudyResult", "judge", "random_choice",
           "oracle_choice", "group_rows", "analyse", "summarise", "ordered"]

RANDOM = "random pick"  # reference row: the expected result of a uniformly random candidate
ORACLE = "oracle"  # reference row: the pick made with target labels


# --------------------------------------------------------------------------------------------------------------
# one group

@dataclass(frozen=True)
class Choice:
    """What one score does with one group of candidates. Accuracies are fractions in [0, 1]."""

    picked: Optional[int]  # index of the picked candidate; None when no candidate has a value for the score
    picked_accuracy: Optional[float]  # its target accuracy (for the random pick: the mean over candidates)
    best_accuracy: float  # the best target accuracy among the candidates (hindsight)
    regret: Optional[float]  # best − picked accuracy; None when nothing was picked
    spearman: Optional[float]  # oriented rank correlation with accuracy; None when undefined (see reason)
    picked_best: Optional[float]  # 1.0/0.0 whether the pick is a best candidate (random pick: its probability)
    n_candidates: int  # candidates in the group
    n_scored: int  # candidates with a value for the score
    reason: Optional[str] = None  # why picked or spearman is None
    tied_at_top: int = 0  # scored candidates sharing the picked value (> 1: the earliest won the tie)
    regret_random_tie_break: Optional[float] = None  # expected regret had the tie gone to a random tied candidate


def _accuracies(accuracies: Sequence[float], owner: str) -> List[float]:
    acc = list(accuracies)
    if not acc:
        raise ValueError(f"{owner} needs at least one candidate. Got an empty list of accuracies.")
    for a in acc:
        if isinstance(a, bool) or not isinstance(a, numbers.Real) or not 0.0 <= float(a) <= 1.0:
            raise ValueError(f"The accuracies given to {owner} must be numbers in [0, 1]. Got {a!r} in {acc!r}.")
    return [float(a) for a in acc]


def _gap(best: float, picked: float) -> float:
    """``best − picked`` rounded to 1e-6 (a ten-thousandth of a point): accuracies arrive in float32 (errors near
    1e-7), and equal gaps computed from different pairs must stay equal, else an interval over identical regrets
    gets a spurious width. Accuracies are counts over at most thousands of samples, so real gaps are far wider."""
    return round(best - picked, 6)


def _spearman(x: Sequence[float], y: Sequence[float]) -> Tuple[Optional[float], Optional[str]]:
    from scipy.stats import spearmanr

    if len(x) < 2:
        return None, "fewer than two scored candidates"
    if len(set(x)) == 1:
        return None, "the score is the same for every scored candidate"
    if len(set(y)) == 1:
        return None, "the target accuracy is the same for every scored candidate"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rho = float(spearmanr(x, y)[0])
    # rounded so that a perfect ordering reads as exactly ±1 (scipy's Pearson-on-ranks leaves ~1e-16)
    return (round(rho, 12), None) if math.isfinite(rho) else (None, "undefined rank correlation")


def judge(accuracies: Sequence[float], values: Sequence[Optional[float]], score: str) -> Choice:
    """Pick a candidate by ``score`` and measure the pick against target accuracy.

    ``accuracies[i]`` is candidate ``i``'s target accuracy and ``values[i]`` its value of ``score`` (a name in
    :data:`adaptkit.select.SCORES`, whose direction is used); ``None`` or a non-finite value means the candidate
    lacks the score and is never picked. The pick is :func:`adaptkit.select.pick_best` (ties: the earliest).

    >>> c = judge([0.9, 0.7, 0.8], [0.2, 0.1, None], "iwcv")   # iwcv: lower is better
    >>> c.picked, round(c.regret, 6), c.spearman, c.n_scored
    (1, 0.2, -1.0, 2)
    """
    from ..select import SCORES, pick_best

    if score not in SCORES:
        raise ValueError(f"Unknown selection score {score!r}. Available selection scores: {', '.join(SCORES)}.")
    acc = _accuracies(accuracies, "judge")
    vals = list(values)
    if len(vals) != len(acc):
        raise ValueError(f"judge needs one score value per candidate: got {len(vals)} values for {len(acc)} "
                         "accuracies.")
    clean: List[Optional[float]] = []
    for v in vals:
        if v is not None and (isinstance(v, bool) or not isinstance(v, numbers.Real)):
            raise ValueError(f"The values given to judge must be numbers or None. Got {v!r} in {vals!r}.")
        clean.append(None if v is None or not math.isfinite(float(v)) else float(v))
    best = max(acc)
    scored = [i for i, v in enumerate(clean) if v is not None]
    if not scored:
        return Choice(None, None, best, None, None, None, len(acc), 0,
                      f"no candidate has a value for {score}")
    picked = pick_best([{score: v} for v in clean], score)
    assert picked is not None  # internal invariant: some candidate is scored
    sign = 1.0 if SCORES[score].higher_is_better else -1.0
    rho, why = _spearman([sign * clean[i] for i in scored], [acc[i] for i in scored])
    tied = [i for i in scored if clean[i] == clean[picked]]
    return Choice(picked, acc[picked], best, _gap(best, acc[picked]), rho, float(acc[picked] == best), len(acc),
                  len(scored), why, len(tied), _gap(best, sum(acc[i] for i in tied) / len(tied)))


RULE_PREFIX = "rule: "  # rows of selection rules (adaptkit.trust.rules), beside the single scores
# the rules the study judges (every score is judged on its own too); info_iwcv_agreement: benchmarks/rule_search.py
RULES = ("rank_agreement", "vetoed_info_max", "info_iwcv_agreement")


def judge_rule(accuracies: Sequence[float], scores: Mapping[str, Sequence[Optional[float]]], rule: str) -> Choice:
    """Pick a candidate with a selection rule of :mod:`adaptkit.trust.rules` (which may combine several scores)
    and measure the pick against target accuracy, as :func:`judge` does for one score. No rank correlation (a rule
    picks, it does not rank).

    >>> c = judge_rule([0.9, 0.5], {"source_val_accuracy": [0.95, 0.6], "info_max": [0.2, 0.4]}, "vetoed_info_max")
    >>> c.picked, c.regret
    (0, 0.0)
    """
    from ..trust.rules import choose

    acc = _accuracies(accuracies, "judge_rule")
    cands = [{k: v[i] for k, v in scores.items()} for i in range(len(acc))]
    picked = choose(cands, rule)
    best = max(acc)
    if picked is None:
        return Choice(None, None, best, None, None, None, len(acc), 0, f"rule {rule} needs scores none has")
    return Choice(picked, acc[picked], best, _gap(best, acc[picked]), None, float(acc[picked] == best), len(acc),
                  len(acc), "a rule picks, it does not rank", 1, _gap(best, acc[picked]))


def random_choice(accuracies: Sequence[float]) -> Choice:
    """The expected result of picking one of the candidates uniformly at random: regret = best − mean accuracy,
    and the probability of landing on a best candidate. No rank correlation.

    >>> c = random_choice([0.9, 0.7, 0.8])
    >>> round(c.regret, 6), round(c.picked_best, 4)
    (0.1, 0.3333)
    """
    acc = _accuracies(accuracies, "random_choice")
    best, mean = max(acc), sum(acc) / len(acc)
    return Choice(None, mean, best, _gap(best, mean), None, sum(a == best for a in acc) / len(acc), len(acc), len(acc),
                  "a random pick has no ranking", 0, _gap(best, mean))


def oracle_choice(accuracies: Sequence[float]) -> Choice:
    """The pick made with target labels: a best candidate, regret 0 (the other end of the scale)."""
    acc = _accuracies(accuracies, "the oracle")
    best = max(acc)
    return Choice(acc.index(best), best, best, 0.0, 1.0 if len(set(acc)) > 1 else None, 1.0, len(acc), len(acc),
                  None if len(set(acc)) > 1 else "the target accuracy is the same for every candidate", 0, 0.0)


# --------------------------------------------------------------------------------------------------------------
# many groups


@dataclass(frozen=True)
class Group:
    """The finished candidates of one method on one shift with one seed, in plan order."""

    method: str  # the base label
    shift: str
    seed: int
    labels: Tuple[str, ...]  # cell labels of the finished candidates
    displays: Tuple[str, ...]  # dann[weight=0.3, lr=0.001] …
    accuracies: Tuple[float, ...]
    scores: Dict[str, Tuple[Optional[float], ...]]  # score name -> one value per candidate
    n_not_ok: int = 0  # candidates that failed or diverged (left out)


def group_rows(rows: Sequence[Mapping[str, Any]], candidates: Sequence[Candidate],
               scores: Sequence[str]) -> Tuple[List[Group], Dict[str, int]]:
    """Group grid result rows by (method, shift, seed). Returns the groups with at least one finished candidate
    and counts ``{"failed candidates": …, "groups under two candidates": …}``; groups with fewer than two finished
    candidates are left out of the returned list (there is nothing to choose)."""
    by_label = {k.label: k for k in candidates}
    buckets: Dict[Tuple[str, str, int], List[Tuple[Candidate, Mapping[str, Any]]]] = {}
    not_ok: Dict[Tuple[str, str, int], int] = {}
    for r in rows:
        k = by_label.get(r["method"])
        if k is None:
            raise ValueError(f"result row of method {r['method']!r} matches no candidate of the sweep "
                             f"({', '.join(list(by_label)[:5])}{' …' if len(by_label) > 5 else ''}).")
        key = (k.base, r["shift"], int(r["seed"]))
        buckets.setdefault(key, [])
        if r["status"] != "ok" or r.get("target_accuracy") is None:
            not_ok[key] = not_ok.get(key, 0) + 1
            continue
        buckets[key].append((k, r))
    groups, small = [], 0
    for (base, shift, seed), members in buckets.items():
        if len(members) < 2:
            small += 1
            continue
        groups.append(Group(
            method=base, shift=shift, seed=seed, labels=tuple(k.label for k, _ in members),
            displays=tuple(k.display() for k, _ in members),
            accuracies=tuple(float(r["target_accuracy"]) for _, r in members),
            scores={s: tuple(r.get(f"score/{s}") for _, r in members) for s in scores},
            n_not_ok=not_ok.get((base, shift, seed), 0)))
    return groups, {"failed candidates": sum(not_ok.values()), "groups under two candidates": small}


def analyse(groups: Sequence[Group], scores: Sequence[str]) -> List[Dict[str, Any]]:
    """One record per (score, group) — the six scores, then ``random pick`` and ``oracle`` — ready for the CSV."""
    out = []
    for g in groups:
        judged = [(s, judge(g.accuracies, g.scores[s], s)) for s in scores]
        needs = {"source_val_accuracy", "info_max"}
        judged += [(RULE_PREFIX + r, judge_rule(g.accuracies, g.scores, r)) for r in RULES if needs <= set(g.scores)]
        judged += [(RANDOM, random_choice(g.accuracies)), (ORACLE, oracle_choice(g.accuracies))]
        best = g.accuracies.index(max(g.accuracies))
        for name, c in judged:
            out.append({"score": name, "method": g.method, "shift": g.shift, "seed": g.seed,
                        "candidates": c.n_candidates, "scored": c.n_scored,
                        "picked": None if c.picked is None else g.displays[c.picked],
                        "picked_accuracy": c.picked_accuracy, "best": g.displays[best],
                        "best_accuracy": c.best_accuracy, "regret": c.regret, "spearman": c.spearman,
                        "picked_best": c.picked_best, "tied_at_top": c.tied_at_top,
                        "regret_random_tie_break": c.regret_random_tie_break})
    return out


@dataclass(frozen=True)
class ScoreSummary:
    """A score's record over a set of groups. Regret is a fraction (× 100 for accuracy points)."""

    score: str
    regret: Interval  # mean regret with its 95% t-interval over the groups where the score picked
    regret_random_tie_break: Interval  # the same had every tie at the top gone to a random tied candidate
    spearman_mean: Optional[float]  # mean oriented ρ over the groups where it is defined
    n_spearman: int
    share_best: Optional[float]  # share of groups where the pick was a best candidate
    n_groups: int  # groups considered
    n_missing: int  # groups where no candidate had the score
    n_tied: int = 0  # groups where several candidates shared the best value of the score (the earliest was picked)


def summarise(records: Sequence[Mapping[str, Any]], names: Sequence[str]) -> List[ScoreSummary]:
    """Per name (score, ``random pick``, ``oracle``): mean regret ± 95% t-interval, mean ρ, share of best picks."""
    out = []
    for name in names:
        mine = [r for r in records if r["score"] == name]
        picked = [r for r in mine if r["regret"] is not None]
        rhos = [r["spearman"] for r in mine if r["spearman"] is not None]
        out.append(ScoreSummary(
            score=name, regret=t_interval([r["regret"] for r in picked]),
            regret_random_tie_break=t_interval([r.get("regret_random_tie_break", r["regret"]) for r in picked]),
            spearman_mean=sum(rhos) / len(rhos) if rhos else None, n_spearman=len(rhos),
            share_best=(sum(r["picked_best"] for r in picked) / len(picked)) if picked else None,
            n_groups=len(mine), n_missing=len(mine) - len(picked),
            n_tied=sum(1 for r in picked if (r.get("tied_at_top") or 0) > 1)))
    return out


def ordered(summaries: Sequence[ScoreSummary]) -> List[ScoreSummary]:
    """Scores by mean regret (missing last), then the random pick, then the oracle."""
    scores = [s for s in summaries if s.score not in (RANDOM, ORACLE)]
    scores.sort(key=lambda s: (s.regret.mean is None, s.regret.mean if s.regret.mean is not None else 0.0))
    return scores + [s for s in summaries if s.score == RANDOM] + [s for s in summaries if s.score == ORACLE]


@dataclass
class StudyResult:
    """What a selection study leaves: the grid, the groups, one record per score × group, and the summaries."""

    grid: Any  # the adaptkit.bench.grid.GridResult that trained the candidates
    candidates: List[Candidate]
    groups: List[Group]
    records: List[Dict[str, Any]]
    summaries: List[ScoreSummary]
    counts: Dict[str, int]
    markdown: Optional[Path]
    csv: Optional[Path]
    wall_seconds: float
