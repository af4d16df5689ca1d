"""Selection rules: which of several candidate runs to keep, from label-free scores only.

A *rule* maps a list of candidates — each a mapping of score name → value (``None`` when a score is missing), as
the summaries' ``score/<name>`` entries hold them — to the index of the candidate it keeps. Rules build on the
scores of :mod:`adaptkit.select` and their directions.

* ``"<score>"`` — any single score of :data:`adaptkit.select.SCORES`, in its own direction.
* ``"vetoed_<score>"`` — the same score among the candidates whose source-validation accuracy is within
  ``veto`` of the best candidate's (a candidate that lost what it knew about the source is never kept).
* ``"rank_agreement"`` — among the same vetoed candidates, the lowest mean rank over several scores
  (:data:`AGREEMENT_SCORES`), each ranked in its own direction: a candidate many scores like beats one a single
  score likes.
* ``"info_iwcv_agreement"`` — among all candidates (no veto), the lowest mean rank over information maximisation and
  IWCV (:data:`INFO_IWCV_SCORES`): the one score reads the target predictions, the other the importance-weighted
  source risk, and each was at its weakest where the other was strong.

Ranks: 0 is the best, each score in its own direction; tied values share their mean rank (``scipy.stats.rankdata``);
a candidate without a score ranks last on it; a score no ranked candidate has is left out of the mean. Ties go to the
earliest candidate (callers list candidates from the smallest alignment weight up, so a tie keeps
the milder adaptation). Which rule adaptkit uses by default was chosen by measurement on the selection study
(``benchmarks/SELECTION.md``); no rule replaces a labelled target sample.
"""
from __future__ import annotations

from typing import Mapping, Optional, Sequence

import numpy as np

from .._checks import check_number

__all__ = ["AGREEMENT_SCORES", "INFO_IWCV_SCORES", "DEFAULT_RULE", "DEFAULT_VETO", "rule_names", "choose"]

AGREEMENT_SCORES = ("info_max", "dev", "iwcv", "source_val_accuracy")  # ours: the scores rank_agreement averages
# ours: the scores info_iwcv_agreement averages. Chosen by benchmarks/rule_search.py on the 2026-12-03 selection
# study (48 groups, seeds 0 and 1), the best of eight pre-registered rule families: mean regret 3.5 ± 1.2 points,
# worst 13.3, against info_max's 4.6 ± 1.7, worst 28.6 (lower on both seed halves: 4.1 vs 4.3 and 2.9 vs 5; the
# paired difference, −1.1 ± 1.8 points, includes 0). It did NOT hold up on the confirmatory study (seeds 2 and 3:
# 5 ± 3 points, worst 60.7, against info_max's 3.4 ± 1.4, worst 23.1; benchmarks/SELECTION.md): not the default,
# kept so that the study keeps judging it.
INFO_IWCV_SCORES = ("info_max", "iwcv")
DEFAULT_VETO = 0.02  # ours: a candidate more than 2 points below the best source-validation accuracy is vetoed
DEFAULT_RULE = "rank_agreement"  # chosen on the selection study (benchmarks/SELECTION.md)
_SVA = "source_val_accuracy"


def rule_names() -> list:
    """Every rule :func:`choose` accepts."""
    from ..select import SCORES

    return ["rank_agreement", "info_iwcv_agreement"] + list(SCORES) + [f"vetoed_{s}" for s in SCORES if s != _SVA]


def _value(c: Mapping, name: str) -> Optional[float]:
    v = c.get(name, c.get(f"score/{name}"))
    return None if v is None or not np.isfinite(float(v)) else float(v)


def _ranks(values: Sequence[Optional[float]], higher_is_better: bool) -> np.ndarray:
    """Rank 0 = best; missing values rank last; ties share their mean rank (scipy.stats.rankdata)."""
    from scipy.stats import rankdata

    x = np.array([np.inf if v is None else (-v if higher_is_better else v) for v in values], dtype=np.float64)
    return rankdata(x, method="average") - 1.0


def choose(candidates: Sequence[Mapping[str, Optional[float]]], rule: str = DEFAULT_RULE,
           veto: float = DEFAULT_VETO) -> Optional[int]:
    """Index of the candidate ``rule`` keeps, or ``None`` when no candidate has what the rule needs.

    Example:
        >>> cands = [{"source_val_accuracy": 0.95, "info_max": 0.30, "dev": 0.4, "iwcv": 0.4},
        ...          {"source_val_accuracy": 0.80, "info_max": 0.60, "dev": 0.3, "iwcv": 0.3},  # vetoed
        ...          {"source_val_accuracy": 0.94, "info_max": 0.50, "dev": 0.35, "iwcv": 0.38}]
        >>> choose(cands, "info_max"), choose(cands, "vetoed_info_max"), choose(cands, "rank_agreement")
        (1, 2, 2)
        >>> choose(cands, "info_iwcv_agreement")  # no veto: 1 is first on info_max and on iwcv
        1
    """
    from ..select import SCORES

    names = rule_names()
    if rule not in names:
        raise ValueError(f"The 'rule' parameter of choose must be one of {{{', '.join(map(repr, names))}}}. "
                         f"Got {rule!r} instead.")
    veto = check_number("veto", "choose", veto, low=0.0, high=1.0)
    cands = list(candidates)
    if not cands:
        return None
    allowed = np.ones(len(cands), dtype=bool)
    if rule == "rank_agreement" or rule.startswith("vetoed_"):
        sva = [_value(c, _SVA) for c in cands]
        known = [v for v in sva if v is not None]
        if known:
            allowed = np.array([v is not None and v >= max(known) - veto - 1e-12 for v in sva])
    if rule in ("rank_agreement", "info_iwcv_agreement"):
        names = AGREEMENT_SCORES if rule == "rank_agreement" else INFO_IWCV_SCORES
        idx = np.flatnonzero(allowed)  # ranked among the candidates the veto (if any) leaves
        present = [s for s in names if any(_value(cands[i], s) is not None for i in idx)]
        if not present:
            return None
        mean_rank = np.mean([_ranks([_value(cands[i], s) for i in idx], SCORES[s].higher_is_better)
                             for s in present], axis=0)
        return int(idx[np.argmin(mean_rank)])
    score = rule[len("vetoed_"):] if rule.startswith("vetoed_") else rule
    sign = 1.0 if SCORES[score].higher_is_better else -1.0
    best, best_value = None, -np.inf
    for i, c in enumerate(cands):
        v = _value(c, score)
        if allowed[i] and v is not None and sign * v > best_value:
            best, best_value = i, sign * v
    return best
