"""The info_iwcv_agreement selection rule (adaptkit/trust/rules.py) against a hand computation.

Reference: the mean of the two rank vectors computed here with scipy.stats.rankdata (method="average": tied values
share their mean rank), info_max negated (higher is better) and iwcv as is (lower is better), a missing value
ranked last (+inf), and numpy.argmin (the first minimum: ties go to the earliest candidate).
"""
import numpy as np
import pytest
from scipy.stats import rankdata

from adaptkit.bench.judge import RULES, judge_rule
from adaptkit.trust.rules import choose, rule_names


def _by_hand(info, iwcv):
    """Index the rule should keep, from scipy.stats.rankdata and numpy.argmin (the module docstring's reference)."""
    rows = []
    if any(v is not None for v in info):
        rows.append(rankdata([np.inf if v is None else -v for v in info], method="average"))
    if any(v is not None for v in iwcv):
        rows.append(rankdata([np.inf if v is None else v for v in iwcv], method="average"))
    return None if not rows else int(np.argmin(np.mean(rows, axis=0)))


def _cands(info, iwcv, sva=None):
    sva = sva or [0.9] * len(info)
    return [{"info_max": a, "iwcv": b, "source_val_accuracy": s, "dev": 0.5} for a, b, s in zip(info, iwcv, sva)]


def test_the_rule_is_named_and_judged_by_the_study():
    assert "info_iwcv_agreement" in rule_names() and "info_iwcv_agreement" in RULES


def test_a_small_list_by_hand_directions_matter():
    # info_max ranks (higher better): c0 0.50 -> 1, c1 0.20 -> 3, c2 0.60 -> 0, c3 0.40 -> 2
    # iwcv ranks (lower better):      c0 0.30 -> 0, c1 0.35 -> 1, c2 0.60 -> 3, c3 0.40 -> 2
    # mean ranks: c0 0.5, c1 2.0, c2 1.5, c3 2.0 -> c0 (info_max alone keeps c2, iwcv alone c0)
    info, iwcv = [0.50, 0.20, 0.60, 0.40], [0.30, 0.35, 0.60, 0.40]
    assert _by_hand(info, iwcv) == 0
    assert choose(_cands(info, iwcv), "info_iwcv_agreement") == 0
    assert choose(_cands(info, iwcv), "info_max") == 2 and choose(_cands(info, iwcv), "iwcv") == 0
    # reversing iwcv's direction would keep c2 (ranks 3,2,0,1 -> means 2, 2.5, 0, 1.5): the direction is checked
    assert int(np.argmin((rankdata(-np.array(info)) + rankdata(-np.array(iwcv))) / 2)) == 2


def test_no_source_accuracy_veto():
    # c0 lost 30 points of source accuracy yet is first on both scores: this rule has no veto (rank_agreement has)
    info, iwcv, sva = [0.9, 0.5, 0.4], [0.1, 0.3, 0.5], [0.60, 0.90, 0.91]
    assert choose(_cands(info, iwcv, sva), "info_iwcv_agreement") == 0
    assert choose(_cands(info, iwcv, sva), "rank_agreement") != 0


def test_ties_share_their_mean_rank_and_go_to_the_earliest_candidate():
    # info_max ties c1 and c2 (rank 1.5 each); iwcv ties c0 and c2 (rank 0.5 each)
    # scipy ranks (1-based): info [3, 1.5, 1.5, 4], iwcv [1.5, 3, 1.5, 4] -> means [2.25, 2.25, 1.5, 4] -> c2
    info, iwcv = [0.3, 0.5, 0.5, 0.1], [0.2, 0.4, 0.2, 0.9]
    assert _by_hand(info, iwcv) == 2 == choose(_cands(info, iwcv), "info_iwcv_agreement")
    # c0 and c1 tie on mean rank (c0 first on iwcv, c1 on info_max): the earliest, c0, is kept
    info, iwcv = [0.4, 0.6, 0.1], [0.1, 0.3, 0.9]
    assert _by_hand(info, iwcv) == 0 == choose(_cands(info, iwcv), "info_iwcv_agreement")
    assert choose(list(reversed(_cands(info, iwcv))), "info_iwcv_agreement") == 1  # reversed order: the earlier wins


def test_missing_scores_rank_last_and_an_absent_score_is_left_out():
    # c1 has no iwcv: ranked last on it (scipy: +inf) -> info [2, 1, 3], iwcv [1, 3, 2] -> means [1.5, 2, 2.5] -> c0
    info, iwcv = [0.5, 0.7, 0.2], [0.1, None, 0.4]
    assert _by_hand(info, iwcv) == 0 == choose(_cands(info, iwcv), "info_iwcv_agreement")
    # a non-finite value counts as missing
    assert choose(_cands(info, [0.1, float("nan"), 0.4]), "info_iwcv_agreement") == 0
    # no candidate has iwcv: the rule is info_max alone
    assert choose(_cands(info, [None] * 3), "info_iwcv_agreement") == 1 == _by_hand(info, [None] * 3)
    # neither score anywhere: nothing to keep
    assert choose(_cands([None] * 3, [None] * 3), "info_iwcv_agreement") is None
    assert choose([], "info_iwcv_agreement") is None


def test_random_lists_match_the_hand_computation():
    rng = np.random.default_rng(0)
    for _ in range(200):
        n = int(rng.integers(2, 10))
        info = [None if rng.random() < 0.15 else float(np.round(rng.random(), 1)) for _ in range(n)]  # rounding: ties
        iwcv = [None if rng.random() < 0.15 else float(np.round(rng.random(), 1)) for _ in range(n)]
        assert choose(_cands(info, iwcv), "info_iwcv_agreement") == _by_hand(info, iwcv), (info, iwcv)


def test_the_study_judges_it_like_any_rule():
    # judge_rule: regret = best - picked accuracy; the rule keeps c0 (the small list above), best is c2
    scores = {"info_max": [0.50, 0.20, 0.60, 0.40], "iwcv": [0.30, 0.35, 0.60, 0.40]}
    c = judge_rule([0.70, 0.60, 0.80, 0.75], scores, "info_iwcv_agreement")
    assert c.picked == 0 and c.regret == pytest.approx(0.10)
