"""The selection study: how well does each label-free selection score choose among hyper-parameter candidates?

**Question.** After a sweep you hold several trained candidates of one method and no target labels. Each score of
:data:`adaptkit.select.SCORES` ranks them; how much target accuracy do you lose by trusting it?

**Candidates.** A bench config with a ``sweep`` — option → list of values — expands every method entry into one
grid entry per combination of the values of the options that method has (:func:`expand_sweep`). ``lr`` is the
learning rate of the shift's recipe optimiser, which every method has; any other key is a method option (``weight``
for dann, confusion, coral, mmd and adr; ``adapt_lr`` for adda), applied only to the methods that have it. A
candidate is an ordinary grid cell labelled ``<method>__<option><value>__…`` (``dann__weight0.3__lr0.001``), so the
grid's machinery — worker processes, resume, fault isolation, ``results.csv`` — is reused unchanged
(:func:`adaptkit.bench.grid.plan_grid` calls :func:`expand_sweep`; :func:`run_study` then calls
:func:`~adaptkit.bench.grid.execute`). Every cell records every score at its final evaluation (``score/<name>`` in
the summary's ``final`` record); the candidate is the model after its last step.

**Groups and numbers.** A *group* is one (method, shift, seed): the candidates of one method trained on the same
data draw with the same seed. Candidates that failed or diverged are left out (and counted). For each group with at
least two finished candidates and each score (:func:`judge`):

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
t_interval`), mean ρ, and the share of groups where it picked a best candidate; overall, per shift and per method.
Two reference rows give the scale: ``random pick`` (the expected regret of a uniformly random candidate, best −
mean, and the expected share of best picks) and ``oracle`` (picks with target labels: regret 0).

**Outputs.** Beside the grid's ``cells/`` and ``results.csv``: ``selection.md`` (the tables, the settings and what
the study does not show) and ``selection.csv`` (one row per score × group, plus the two reference rows), written
atomically. The grid's own ``report.md`` is not written for a study (dozens of candidates per shift make it
unreadable); ``results.csv`` holds every cell's accuracy and scores.

**Command line.** The shipped study is a named bench grid, so the bench app runs it (it runs a study whenever the
config has a ``sweep``); every bench key can be overridden, and a rerun resumes::

    adaptkit-bench bench=selection workers=2
    adaptkit-bench bench=selection sweep.weight=[0.3,3] sweep.lr=[0.001] seeds=[0] out_dir=runs/sel_small

Hydra *merges* a ``sweep`` given on the command line into the config's, key by key: change one with
``sweep.lr=[0.001]``, remove one with ``~sweep.adapt_lr``, add one with ``+sweep.gamma=[5,10]`` (from Python,
``sweep={...}`` replaces the whole sweep). A sweep key that is an option of no method of the grid is skipped for
every method; one that is no registered method's option at all is refused as a typo.

Example:
    >>> from adaptkit.bench.selection import run_study
    >>> study = run_study("selection", workers=2, seeds=[0])  # doctest: +SKIP
    >>> print(study.table())  # doctest: +SKIP
"""
from __future__ import annotations

import csv
import io
import itertools
import json
import math
import numbers
import re
import time
import warnings
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any, Dict, List, Mapping, Optional, Sequence, Tuple

from .grid import RESOLVED_CONFIG, GridResult, MethodEntry, execute, load_config, plan_grid
from .stats import Interval, format_mean_ci, t_interval

__all__ = [
    "LR",
    "RANDOM",
    "ORACLE",
    "Candidate",
    "Choice",
    "ScoreSummary",
    "StudyResult",
    "expand_sweep",
    "judge",
    "random_choice",
    "group_rows",
    "analyse",
    "summarise",
    "write_study",
    "run_study",
    "run_study_from_config",
]

LR = "lr"  # the sweep key for the recipe optimiser's learning rate (every method has one)
RANDOM = "random pick"  # reference row: the expected result of a uniformly random candidate
ORACLE = "oracle"  # reference row: the pick made with target labels
SELECTION_MD = "selection.md"
SELECTION_CSV = "selection.csv"
CSV_COLUMNS = ("score", "method", "shift", "seed", "candidates", "scored", "picked", "picked_accuracy", "best",
               "best_accuracy", "regret", "spearman", "picked_best", "tied_at_top", "regret_random_tie_break")

_VALUE_TEXT = re.compile(r"^[A-Za-z0-9._-]+$")  # a swept value as it appears in a folder-safe label

_WARNING = (
    "No label-free score replaces a labelled target sample. Every score below is computed without target labels, "
    "and every one of them can pick a candidate far below the best; the regrets here were measured *with* target "
    "labels, which a real deployment does not have. If choosing wrongly can hurt someone, label a sample of the "
    "target domain and choose with it."
)


# --------------------------------------------------------------------------------------------------------------
# candidates


@dataclass(frozen=True)
class Candidate:
    """One point of a sweep: a grid method entry and the swept values that made it."""

    method: MethodEntry  # the grid entry (label, name, options with the swept method options)
    base: str  # the label of the unswept entry: candidates with the same base and seed form a group
    settings: Tuple[Tuple[str, Any], ...]  # (option, value) in sweep order; ``lr`` is the recipe's learning rate
    recipe: Dict[str, Any] = field(default_factory=dict)  # overrides of the shift's recipe (``{optim: {lr: v}}``)

    @property
    def label(self) -> str:
        return self.method.label

    def display(self) -> str:
        """``dann[weight=0.3, lr=0.001]`` (the base label alone when nothing was swept)."""
        if not self.settings:
            return self.base
        return f"{self.base}[{', '.join(f'{k}={_value_text(v)}' for k, v in self.settings)}]"


def _value_text(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v)  # exact: two distinct floats never share a label
    return str(v)


def _check_values(key: Any, values: Any) -> List[Any]:
    owner = "the bench config's sweep"
    if not isinstance(key, str) or not key:
        raise ValueError(f"The keys of {owner} must be option names (or {LR!r}). Got {key!r} instead.")
    if isinstance(values, (str, bytes)) or not isinstance(values, Sequence) or not values:
        raise ValueError(f"The {key!r} entry of {owner} must be a non-empty list of values, e.g. {key}: [0.3, 1.0]. "
                         f"Got {values!r} instead.")
    out = []
    for v in values:
        if not isinstance(v, (numbers.Real, str)) or (isinstance(v, numbers.Real) and not isinstance(v, bool)
                                                      and not math.isfinite(float(v))):
            raise ValueError(f"The {key!r} entry of {owner} must list finite numbers, strings or booleans. "
                             f"Got {v!r} in {list(values)!r}.")
        if isinstance(v, str) and not _VALUE_TEXT.match(v):
            raise ValueError(f"The {key!r} entry of {owner} lists {v!r}; a swept string must be folder-safe "
                             "(letters, digits, '.', '_', '-'), since it becomes part of a cell's folder name.")
        if key == LR and (isinstance(v, (bool, str)) or v <= 0):
            raise ValueError(f"The {LR!r} entry of {owner} must list learning rates in (0, inf). Got {v!r} in "
                             f"{list(values)!r}.")
        out.append(v)
    texts = [_value_text(v) for v in out]
    if len(set(texts)) != len(texts) or any(a == b for a, b in itertools.combinations(out, 2)):  # 1 == 1.0 too
        raise ValueError(f"The {key!r} entry of {owner} must list distinct values. Got {list(values)!r}.")
    return out


def expand_sweep(methods: Sequence[MethodEntry], sweep: Mapping[str, Sequence[Any]]) -> List[Candidate]:
    """One :class:`Candidate` per method entry and combination of the swept values of the options it has.

    ``sweep`` maps ``lr`` (the recipe optimiser's learning rate) or a method option (``weight``, ``adapt_lr`` …) to a
    list of values. A method gets the product of the values of the keys it accepts, in the sweep's key order; a
    method with none of them stays one candidate under its own label. A key that is no method's option (a typo), a
    key also set in an entry's ``options``, an empty or repeated value list, or a non-positive learning rate raise
    ``ValueError`` naming the value and what is accepted. Method option values are validated by the method itself.

    Example:
        >>> from adaptkit.bench.grid import MethodEntry
        >>> ks = expand_sweep([MethodEntry("coral", "coral", {})], {"weight": [0.3, 1.0], "lr": [0.001]})
        >>> [k.label for k in ks]
        ['coral__weight0.3__lr0.001', 'coral__weight1.0__lr0.001']
        >>> ks[0].display(), ks[0].method.options, ks[0].recipe
        ('coral[weight=0.3, lr=0.001]', {'weight': 0.3}, {'optim': {'lr': 0.001}})
    """
    from ..methods import METHODS, build_method

    if not isinstance(sweep, Mapping):
        raise ValueError(f"The bench config's sweep must be a mapping option -> list of values, e.g. "
                         f"{{weight: [0.3, 1.0], lr: [0.001]}}. Got {sweep!r} instead.")
    values = {k: _check_values(k, v) for k, v in sweep.items()}
    accepted: Dict[str, List[str]] = {}
    for m in methods:
        if not isinstance(m, MethodEntry):
            raise TypeError(f"expand_sweep expects the grid's MethodEntry objects. Got {m!r} instead.")
        accepted[m.label] = [f.name for f in fields(build_method(m.name, **m.options).options)]
        if LR in accepted[m.label] and LR in values:
            raise ValueError(f"The sweep key {LR!r} means the recipe's learning rate, but method {m.label!r} also "
                             f"has an option {LR!r}: the sweep would be ambiguous. Sweep that method separately.")
    known = {f.name for n in METHODS.names() for f in fields(METHODS.get(n).Options)}
    for key in values:  # a registered method's option no method of this grid has is fine (it applies to none)
        if key != LR and key not in known and not any(key in a for a in accepted.values()):
            have = "; ".join(f"{label}: {', '.join(a) or '(none)'}" for label, a in accepted.items())
            raise ValueError(f"The sweep key {key!r} is neither {LR!r} (the recipe's learning rate) nor an option of "
                             f"a method. Options of the grid's methods — {have}.")

    out: List[Candidate] = []
    for m in methods:
        keys = [k for k in values if k == LR or k in accepted[m.label]]
        clash = sorted(set(keys) & set(m.options))
        if clash:
            raise ValueError(f"Method {m.label!r} sets {', '.join(map(repr, clash))} in its options and the sweep "
                             "varies it too; remove it from one of the two.")
        if not keys:
            out.append(Candidate(m, m.label, ()))
            continue
        for combo in itertools.product(*(values[k] for k in keys)):
            settings = tuple(zip(keys, combo))
            options = {**m.options, **{k: v for k, v in settings if k != LR}}
            recipe = {"optim": {"lr": float(dict(settings)[LR])}} if LR in keys else {}
            label = m.label + "".join(f"__{k}{_value_text(v)}" for k, v in settings)
            out.append(Candidate(MethodEntry(m.name, label, options), m.label, settings, recipe))
    return out


# --------------------------------------------------------------------------------------------------------------
# judging one group (pure functions over plain numbers)


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


def _oracle_choice(accuracies: Sequence[float]) -> Choice:
    acc = _accuracies(accuracies, "the oracle")
    best = max(acc)
    return Choice(acc.index(best), best, best, 0.0, 1.0 if len(set(acc)) > 1 else None, 1.0, len(acc), len(acc),
                  None if len(set(acc)) > 1 else "the target accuracy is the same for every candidate", 0, 0.0)


# --------------------------------------------------------------------------------------------------------------
# the whole study


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
        judged += [(RANDOM, random_choice(g.accuracies)), (ORACLE, _oracle_choice(g.accuracies))]
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


# --------------------------------------------------------------------------------------------------------------
# the files


def _pp(iv: Interval) -> str:
    if iv.mean is None:
        return "n/a"
    return format_mean_ci(100 * iv.mean, None if iv.half_width is None else 100 * iv.half_width, fallback_decimals=1)


def _rho(x: Optional[float]) -> str:
    return "–" if x is None else f"{x:+.2f}"


def _share(x: Optional[float]) -> str:
    return "n/a" if x is None else f"{100 * x:.0f}%"


def _md_table(header: Sequence[str], rows: Sequence[Sequence[str]], align: str) -> List[str]:
    sep = ["---:" if a == "r" else "---" for a in align]
    return ["| " + " | ".join(header) + " |", "| " + " | ".join(sep) + " |"] + \
        ["| " + " | ".join(r) + " |" for r in rows]


def _ordered(summaries: Sequence[ScoreSummary]) -> List[ScoreSummary]:
    """Scores by mean regret (missing last), then the random pick, then the oracle."""
    scores = [s for s in summaries if s.score not in (RANDOM, ORACLE)]
    scores.sort(key=lambda s: (s.regret.mean is None, s.regret.mean if s.regret.mean is not None else 0.0))
    return scores + [s for s in summaries if s.score == RANDOM] + [s for s in summaries if s.score == ORACLE]


def _direction(name: str) -> str:
    from ..select import SCORES

    if name == RANDOM:
        return "uniform over candidates"
    if name == ORACLE:
        return "uses target labels"
    return "higher" if SCORES[name].higher_is_better else "lower"


def _breakdown(records, names, key: str, values: Sequence[Any], what: str) -> List[str]:
    header = ["score"] + [f"{v}" for v in values]
    rows = []
    for s in names:
        line = [s]
        for v in values:
            summ = summarise([r for r in records if r[key] == v], [s])[0]
            line.append(f"{_pp(summ.regret)} (ρ {_rho(summ.spearman_mean)})" if summ.n_groups else "–")
        rows.append(line)
    return [f"Mean regret in accuracy points ± 95% CI (mean oriented Spearman ρ in brackets), per {what}.", ""] + \
        _md_table(header, rows, "l" + "r" * len(values))


@dataclass
class StudyResult:
    """What a selection study leaves: the grid, the groups, one record per score × group, and the summaries."""

    grid: GridResult
    candidates: List[Candidate]
    groups: List[Group]
    records: List[Dict[str, Any]]
    summaries: List[ScoreSummary]
    counts: Dict[str, int]
    markdown: Optional[Path]
    csv: Optional[Path]
    wall_seconds: float

    def table(self) -> str:
        """A plain-text table of the summaries (best mean regret first; the reference rows last)."""
        header = ["score", "better", "regret pp ± 95% CI", "mean rho", "picked best", "missing", "ties at top"]
        body = [[s.score, _direction(s.score).split(" ")[0] if s.score not in (RANDOM, ORACLE) else "-",
                 _pp(s.regret), _rho(s.spearman_mean), _share(s.share_best), str(s.n_missing),
                 "-" if s.score in (RANDOM, ORACLE) else str(s.n_tied)]
                for s in _ordered(self.summaries)]
        widths = [max(len(x) for x in col) for col in zip(header, *body)]
        fmt = lambda cols: "  ".join(c.ljust(w) if i < 2 else c.rjust(w) for i, (c, w) in enumerate(zip(cols, widths)))
        return "\n".join([fmt(header), fmt(["-" * w for w in widths])] + [fmt(b) for b in body])


def _target_test_size(shift) -> Optional[int]:
    """Labelled target test samples of a shift (seed 0): the granularity of its accuracies."""
    from ..data.shifts import make_shift

    try:
        data = make_shift(shift.name, seed=0, **shift.params).scoring_sets()["target_test"]
        return int(len(data.y))
    except Exception:  # noqa: BLE001 — a note in the report, never a reason to lose the study
        return None


def write_study(study: StudyResult, out_dir: Path, scores: Sequence[str], *, command: Optional[str] = None) -> \
        Tuple[Path, Path]:
    """Write ``selection.csv`` and ``selection.md`` into ``out_dir`` atomically; returns their paths."""
    from ..train import files

    out_dir = Path(out_dir)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CSV_COLUMNS)
    for r in study.records:
        w.writerow(["" if r[c] is None else repr(r[c]) if isinstance(r[c], float) else str(r[c])
                    for c in CSV_COLUMNS])
    csv_path = files.write_text(out_dir / SELECTION_CSV, buf.getvalue())

    plan = study.grid.plan
    ordered = _ordered(study.summaries)
    n_groups = len(study.groups)
    per_group = sorted({len(g.accuracies) for g in study.groups})
    sizes = "0" if not per_group else str(per_group[0]) if per_group[0] == per_group[-1] else \
        f"{per_group[0]}–{per_group[-1]}"
    n_methods = len({g.method for g in study.groups})
    sweep = plan.config.get("sweep") or {}
    lines = [
        "# Selection study: which run to trust without target labels",
        "",
        f"> **Read this first.** {_WARNING}",
        "",
        f"{n_methods} method{'s' * (n_methods != 1)} × {len(plan.shifts)} shift{'s' * (len(plan.shifts) != 1)} × "
        f"{len(plan.seeds)} seed{'s' * (len(plan.seeds) != 1)} = {n_groups} groups of candidates ({sizes} finished "
        f"candidates per group); {len(plan.cells)} cells in all. Sweep: "
        f"`{json.dumps(sweep)}`. Every cell recorded every score at its final evaluation; the candidate is the "
        "model after its last step.",
        "",
        "## How to read these numbers",
        "",
        "- A *group* is one method on one shift with one seed: the candidates differ only in the swept values.",
        "- *Regret* = best target accuracy among the group's candidates − target accuracy of the candidate the score "
        "picks, in accuracy points (0: it picked the best). Mean over groups ± half-width of the 95% Student-t "
        "interval (groups treated as independent, which seeds and shifts only roughly are).",
        "- *Spearman ρ* is the rank correlation between the score and target accuracy over a group's candidates, "
        "oriented by the score's direction: +1 means the score orders the candidates exactly as target accuracy "
        "does, 0 no relation, −1 exactly backwards. Mean over the groups where it is defined.",
        "- *Picked the best*: share of groups where the pick had the group's best target accuracy (ties count).",
        f"- *{RANDOM}*: the expected regret of choosing a candidate uniformly at random (best − mean) and the chance "
        f"of landing on a best one. *{ORACLE}*: choosing with target labels (regret 0) — the scale's other end.",
        "- *Missing*: groups where no candidate had a value for the score; they never pick and are left out of "
        "its mean. *Ties at top*: groups where several candidates shared the score's best value (source-validation "
        "accuracy saturates at 100% on easy shifts); the earliest candidate of the sweep won, so the pick there "
        "reflects the sweep's order, not the score. The last column gives the expected regret had each such tie "
        "gone to a random one of the tied candidates. Scores are sorted by mean regret; overlapping intervals mean "
        "their order is not established.",
        "",
        "## All groups",
        "",
    ]
    rows = [[s.score, _direction(s.score), _pp(s.regret), str(s.regret.n), _rho(s.spearman_mean),
             _share(s.share_best), str(s.n_missing), "–" if s.score in (RANDOM, ORACLE) else str(s.n_tied),
             _pp(s.regret_random_tie_break)] for s in ordered]
    lines += _md_table(["score", "better", "mean regret (pp) ± 95% CI", "groups", "mean Spearman ρ",
                        "picked the best", "missing", "ties at top", "regret, random tie-break (pp)"], rows,
                       "llrrrrrrr")
    lines += ["", "## Per shift", ""]
    lines += _breakdown(study.records, [s.score for s in ordered], "shift", [s.label for s in plan.shifts], "shift")
    methods = list(dict.fromkeys(g.method for g in study.groups))
    lines += ["", "## Per method", ""]
    lines += _breakdown(study.records, [s.score for s in ordered], "method", methods, "method")
    lines += ["", "## Candidates", ""]
    for base in dict.fromkeys(k.base for k in study.candidates):
        mine = [k for k in study.candidates if k.base == base]
        swept: Dict[str, List[str]] = {}
        for k in mine:
            for key, v in k.settings:
                swept.setdefault(key, [])
                if _value_text(v) not in swept[key]:
                    swept[key].append(_value_text(v))
        grid_text = " × ".join(f"{key} ∈ {{{', '.join(vs)}}}" for key, vs in swept.items()) or "nothing swept"
        lines.append(f"- **{base}** ({len(mine)} candidate{'s' * (len(mine) != 1)}): {grid_text}")
    lines += ["", "Recipes (shared by every candidate of a shift, except the swept learning rate; the resolved "
                  f"config is in `{RESOLVED_CONFIG}` beside this file):", ""]
    for s in plan.shifts:
        r = plan.recipes[s.label]
        n_test = _target_test_size(s)
        lines.append(f"- **{s.label}** (shift `{s.name}`, params `{json.dumps(s.params, sort_keys=True)}`"
                     + ("" if n_test is None else f"; {n_test} labelled target test samples, so one sample is "
                                                  f"{100 / n_test:.2g} points") + "): "
                     f"encoder `{r['encoder']['name']}`, head `{r['head']['name']}`, {r['optim']['name']} (lr "
                     f"{r['optim']['lr']} unless swept), "
                     f"{r['steps']} steps, batch size {r['batch_size']}.")
    lines += ["", f"Failed or diverged candidates left out: {study.counts.get('failed candidates', 0)}; groups "
                  f"with fewer than two finished candidates left out: "
                  f"{study.counts.get('groups under two candidates', 0)}."]
    if study.records:
        picks = [r for r in study.records if r["score"] not in (RANDOM, ORACLE)]
        worst = max((r for r in picks if r["regret"] is not None), key=lambda r: r["regret"], default=None)
        if worst is not None:
            lines += ["", f"Largest single regret: {100 * worst['regret']:.1f} points ({worst['score']} on "
                          f"{worst['method']} / {worst['shift']} / seed {worst['seed']}: picked `{worst['picked']}` at "
                          f"{100 * worst['picked_accuracy']:.1f}%, best `{worst['best']}` at "
                          f"{100 * worst['best_accuracy']:.1f}%)."]
    lines += [
        "",
        "## What this study does not show",
        "",
        "- **Toy data.** The bundled shifts are small synthetic problems; how the scores rank here says little "
        "about images, text or any real shift. On real images (Office-Home, MDD, checkpoint selection) a published "
        "comparison found the scores within about a point of one another on average, with single domain pairs up "
        "to ~8 points below the best (Joo & Klabjan, IW-GAE, Table 2).",
        "- **Small sweeps.** A handful of candidates per group, two hyper-parameters, short training and few seeds. "
        "With more candidates a score has more chances to be fooled, and a wider sweep contains worse candidates, "
        "which makes every score (and the random pick) look different.",
        "- **Small test sets.** Target accuracies are counted on a few dozen to a few hundred samples (see the "
        "recipes above); on the smallest, one sample moves a regret by several points.",
        "- **Final models only.** Scores were read at the last evaluation; choosing among checkpoints of one run, "
        "or between adapting and not adapting at all, is a different question.",
        "- **Regret against these candidates.** Zero regret means the best *of the sweep*, not a good model; a "
        "sweep of poor candidates has small regrets.",
        "- **No labelled-sample comparison.** The study does not measure how many labelled target examples would "
        "choose as well as a score, nor how a score fares on a shift unlike these; labelled target examples "
        "remain the honest way to decide.",
        "",
        f"> {_WARNING}",
        "",
    ]
    if command:
        g = study.grid
        lines[4:4] = [f"Command: `{command}`; this call trained {g.ran} cells and reused {g.reused} in "
                      f"{study.wall_seconds:.0f} s.", ""]
    md_path = files.write_text(out_dir / SELECTION_MD, "\n".join(lines))
    return md_path, csv_path


# --------------------------------------------------------------------------------------------------------------
# running


def run_study(config: Any = "selection", *, command: Optional[str] = None, **overrides) -> StudyResult:
    """Train every candidate of a sweep (resuming), judge every score, write ``selection.md``/``selection.csv``.

    ``config``: a named bench grid with a sweep (default ``"selection"``: ``configs/bench/selection.yaml``), or a
    composed config / mapping; keyword ``overrides`` set bench keys as for :func:`adaptkit.bench.grid.run_grid`
    (``seeds=[0]``, ``workers=2``, ``out_dir=...``); ``sweep={...}`` *replaces* the config's sweep (on the command
    line hydra merges: set keys one by one, ``sweep.lr=[0.001]``). With ``scores`` empty every
    score of :data:`adaptkit.select.SCORES` is recorded. ``command`` is quoted in ``selection.md``.
    """
    from ..select import SCORES

    t0 = time.perf_counter()
    c = load_config(config, overrides)
    if not c["sweep"]:
        raise ValueError("A selection study needs a sweep: set `sweep` in the bench config, e.g. "
                         "sweep={weight: [0.3, 1.0, 3.0], lr: [0.0003, 0.001]} (keys: 'lr' or method options).")
    if not c["scores"]:
        c["scores"] = list(SCORES)
    plan = replace(plan_grid(c), write_report=False)
    if not any(len([k for k in plan.candidates if k.base == b]) > 1 for b in {k.base for k in plan.candidates}):
        raise ValueError(f"The sweep {c['sweep']!r} gives every method a single candidate: there is nothing to "
                         "choose between. Sweep 'lr' or an option the methods have (e.g. weight).")
    grid = execute(plan)
    groups, counts = group_rows(grid.rows, plan.candidates, plan.scores)
    records = analyse(groups, plan.scores)
    summaries = summarise(records, list(plan.scores) + [RANDOM, ORACLE])
    study = StudyResult(grid=grid, candidates=list(plan.candidates), groups=groups, records=records,
                        summaries=summaries, counts=counts, markdown=None, csv=None,
                        wall_seconds=time.perf_counter() - t0)
    if records:
        study.markdown, study.csv = write_study(study, plan.out_dir, plan.scores, command=command)
    return study


def run_study_from_config(cfg) -> StudyResult:
    """The ``adaptkit-bench`` app for a config with a sweep: run the study, print its table, files and warning."""
    import sys

    from ..run import ADAPTATION_WARNING

    command = " ".join(["adaptkit-bench"] + sys.argv[1:]) if sys.argv and sys.argv[0] else None
    study = run_study(cfg, command=command)
    g = study.grid
    print()
    print(study.table() if study.records else "no group has two finished candidates yet: nothing to judge")
    print()
    bad = {k: v for k, v in g.counts.items() if k != "ok"}
    if bad:
        print("not ok: " + ", ".join(f"{v} {k}" for k, v in sorted(bad.items())) + f" (see {g.results_csv})")
    if study.markdown is not None:
        print(f"results:   {g.results_csv}")
        print(f"selection: {study.markdown}")
    print(f"wall time {study.wall_seconds:.0f}s ({g.ran} cells run, {g.reused} reused, {g.pending} pending)")
    print(_WARNING)
    print(ADAPTATION_WARNING)
    return study
