"""Judging selection scores: picks, regret and rank correlation on hand-made candidate tables (scipy.stats.spearmanr
and scipy.stats.t as the references), score directions, missing scores, ties, and summaries over groups."""
import re

import numpy as np
import pytest
from scipy import stats

from adaptkit.bench.judge import ORACLE, RANDOM, Group, analyse, judge, random_choice, summarise
from adaptkit.select import SCORES, pick_best

ACC = [0.60, 0.90, 0.75, 0.80, 0.70]
VALUES = [0.10, 0.50, 0.30, 0.90, 0.20]


# -- one group ---------------------------------------------------------------------------------------------------
def test_a_higher_is_better_score_picks_its_maximum_and_regret_is_best_minus_picked():
    c = judge(ACC, VALUES, "snd")  # snd: higher is better
    assert c.picked == 3 == pick_best([{"snd": v} for v in VALUES], "snd")
    assert c.picked_accuracy == 0.80 and c.best_accuracy == 0.90
    assert c.regret == pytest.approx(0.10) and c.picked_best == 0.0
    assert c.spearman == pytest.approx(stats.spearmanr(VALUES, ACC)[0])  # scipy: 0.7
    assert (c.n_candidates, c.n_scored) == (5, 5)


def test_a_lower_is_better_score_picks_its_minimum_and_its_rank_correlation_is_oriented():
    c = judge(ACC, VALUES, "iwcv")  # iwcv: a risk, lower is better
    assert not SCORES["iwcv"].higher_is_better
    assert c.picked == 0 == pick_best([{"iwcv": v} for v in VALUES], "iwcv")
    assert c.regret == pytest.approx(0.90 - 0.60)
    # oriented: +1 would mean "ranks the candidates as target accuracy does"; equals ρ(−score, accuracy)
    assert c.spearman == pytest.approx(-stats.spearmanr(VALUES, ACC)[0])
    assert c.spearman == pytest.approx(stats.spearmanr(-np.asarray(VALUES), ACC)[0])


def test_a_perfect_score_has_zero_regret_and_rank_correlation_one_in_either_direction():
    up = judge(ACC, [10 * a for a in ACC], "info_max")  # higher is better and grows with accuracy
    down = judge(ACC, [1 - a for a in ACC], "dev")  # lower is better and falls with accuracy
    for c in (up, down):
        assert c.picked == 1 and c.regret == 0.0 and c.picked_best == 1.0 and c.spearman == pytest.approx(1.0)


def test_a_missing_score_never_picks_even_the_best_candidate():
    values = [0.10, None, 0.30, float("nan"), 0.20]  # the best candidate (0.90) and one NaN lack the score
    c = judge(ACC, values, "target_entropy")  # lower is better
    assert c.picked == 0 and c.n_scored == 3
    assert c.best_accuracy == 0.90 and c.regret == pytest.approx(0.30)  # best over all candidates, scored or not
    kept = [0, 2, 4]
    assert c.spearman == pytest.approx(-stats.spearmanr([values[i] for i in kept], [ACC[i] for i in kept])[0])


def test_a_group_without_the_score_reports_it_missing():
    c = judge(ACC, [None] * 5, "dev")
    assert (c.picked, c.picked_accuracy, c.regret, c.spearman, c.picked_best, c.n_scored) == (None,) * 5 + (0,)
    assert c.reason == "no candidate has a value for dev"


@pytest.mark.parametrize("values, reason", [
    ([0.4, 0.4, 0.4, 0.4, 0.4], "the score is the same for every scored candidate"),
    ([0.4, None, None, None, None], "fewer than two scored candidates"),
])
def test_rank_correlation_is_none_when_undefined(values, reason):
    c = judge(ACC, values, "snd")
    assert c.spearman is None and c.reason == reason
    assert c.picked == 0  # ties go to the earliest candidate, as in pick_best


def test_a_tie_at_the_top_goes_to_the_earliest_candidate_and_is_counted():
    c = judge([0.6, 0.9, 0.75], [1.0, 1.0, 0.5], "source_val_accuracy")  # saturated source accuracy
    assert c.picked == 0 and c.tied_at_top == 2 and c.regret == pytest.approx(0.3)
    assert c.regret_random_tie_break == pytest.approx(0.9 - (0.6 + 0.9) / 2)
    plain = judge([0.6, 0.9, 0.75], [1.0, 0.9, 0.5], "source_val_accuracy")
    assert plain.tied_at_top == 1 and plain.regret_random_tie_break == plain.regret


def test_random_pick_is_best_minus_mean_and_counts_ties_for_best():
    c = random_choice([0.9, 0.7, 0.9, 0.6])
    assert c.regret == pytest.approx(0.9 - np.mean([0.9, 0.7, 0.9, 0.6]))
    assert c.picked_best == pytest.approx(0.5) and c.spearman is None


@pytest.mark.parametrize("call, message", [
    (lambda: judge(ACC, VALUES, "entropy"), "Unknown selection score 'entropy'. Available selection scores: "
                                            "source_val_accuracy, iwcv, dev, target_entropy, info_max, snd, "
                                                "reverse_validation."),
    (lambda: judge(ACC, VALUES[:3], "snd"), "judge needs one score value per candidate: got 3 values for 5"),
    (lambda: judge([0.5, 75.0], [1, 2], "snd"), "must be numbers in [0, 1]. Got 75.0"),
    (lambda: judge(ACC, ["a"] * 5, "snd"), "must be numbers or None. Got 'a'"),
    (lambda: random_choice([]), "random_choice needs at least one candidate"),
])
def test_bad_tables_are_refused_naming_the_value(call, message):
    with pytest.raises(ValueError, match=re.escape(message)):
        call()


# -- many groups -------------------------------------------------------------------------------------------------
def _group(method, shift, seed, acc, **scores):
    n = len(acc)
    return Group(method, shift, seed, tuple(f"c{i}" for i in range(n)), tuple(f"{method}[c{i}]" for i in range(n)),
                 tuple(acc), {s: tuple(v) for s, v in scores.items()})


def test_summaries_average_regret_with_a_t_interval_and_count_missing_groups():
    groups = [
        _group("dann", "moons", 0, [0.9, 0.8, 0.7], snd=[1, 3, 2], dev=[None, None, None]),
        _group("dann", "moons", 1, [0.6, 0.9, 0.8], snd=[1, 3, 2], dev=[0.5, 0.2, 0.1]),
        _group("coral", "blobs", 0, [0.5, 0.7, 0.6], snd=[3, 1, 2], dev=[0.3, 0.2, 0.1]),
    ]
    records = analyse(groups, ["snd", "dev"])
    assert len(records) == 3 * 4  # two scores + random pick + oracle per group
    by = {s.score: s for s in summarise(records, ["snd", "dev", RANDOM, ORACLE])}

    regrets = [0.9 - 0.8, 0.0, 0.7 - 0.5]  # snd picks index 1, 1, 0
    snd = by["snd"]
    assert snd.regret.mean == pytest.approx(np.mean(regrets))
    low, high = stats.t.interval(0.95, 2, loc=np.mean(regrets), scale=stats.sem(regrets))
    assert (snd.regret.low, snd.regret.high) == (pytest.approx(low), pytest.approx(high))
    rhos = [stats.spearmanr([1, 3, 2], [0.9, 0.8, 0.7])[0], stats.spearmanr([1, 3, 2], [0.6, 0.9, 0.8])[0],
            stats.spearmanr([3, 1, 2], [0.5, 0.7, 0.6])[0]]
    assert snd.spearman_mean == pytest.approx(np.mean(rhos)) and snd.n_spearman == 3
    assert snd.share_best == pytest.approx(1 / 3) and snd.n_missing == 0 and snd.n_tied == 0

    dev = by["dev"]  # lower is better: picks index 2 in both scored groups; missing in the first
    assert (dev.n_groups, dev.n_missing, dev.regret.n) == (3, 1, 2)
    assert dev.regret.mean == pytest.approx(np.mean([0.9 - 0.8, 0.7 - 0.6]))
    # regrets are rounded to 1e-6 (accuracies arrive in float32), hence abs=1e-6
    assert by[RANDOM].regret.mean == pytest.approx(np.mean([0.9 - 0.8, 0.9 - np.mean([0.6, 0.9, 0.8]), 0.1]),
                                                   abs=1e-6)
    assert by[ORACLE].regret.mean == 0.0 and by[ORACLE].share_best == 1.0
    row = next(r for r in records if r["score"] == "dev" and r["seed"] == 0)
    assert row["picked"] is None and row["regret"] is None and row["best"] == "dann[c0]"
