"""Benchmark statistics, each checked against an outside reference named in a comment."""
import itertools
import math
import re

import numpy as np
import pytest
import scipy.stats

from adaptkit.bench.stats import (tolerant_ranks, 
    average_ranks,
    format_mean_ci,
    format_p,
    gap_closed,
    paired_comparison,
    round_sig,
    t_interval,
)

ACC = [0.812, 0.845, 0.797, 0.830, 0.821]
A = {0: 0.812, 1: 0.845, 2: 0.797, 3: 0.830, 4: 0.821, 5: 0.805}
B = {0: 0.790, 1: 0.801, 2: 0.799, 3: 0.788, 4: 0.770, 5: 0.811}


# ---------------------------------------------------------------------------------------------------- t interval


@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
def test_t_interval_matches_scipy(confidence):
    # reference: scipy.stats.t.interval with loc = mean, scale = standard error (scipy.stats.sem)
    iv = t_interval(ACC, confidence)
    lo, hi = scipy.stats.t.interval(confidence, len(ACC) - 1, loc=np.mean(ACC), scale=scipy.stats.sem(ACC))
    assert iv.n == 5 and iv.reason is None
    assert iv.mean == pytest.approx(np.mean(ACC), abs=1e-15)
    assert (iv.low, iv.high) == (pytest.approx(lo, abs=1e-12), pytest.approx(hi, abs=1e-12))
    assert iv.half_width == pytest.approx((hi - lo) / 2, abs=1e-12)


def test_t_interval_hand_value():
    # reference: hand computation, t_{0.975, 2} = 4.302653 (standard t tables), s = 0.02, sqrt(3)
    iv = t_interval([0.80, 0.82, 0.84])
    assert iv.half_width == pytest.approx(4.302653 * 0.02 / math.sqrt(3), rel=1e-6)


def test_t_interval_single_seed_is_undefined_not_a_crash():
    iv = t_interval([0.8])
    assert iv.mean == 0.8 and iv.n == 1
    assert iv.low is None and iv.high is None and iv.half_width is None
    assert "two seeds" in iv.reason
    assert str(iv) == "0.80 ± n/a"


def test_t_interval_missing_values_are_dropped_and_counted():
    iv = t_interval([0.8, None, float("nan"), 0.9])
    assert iv.n == 2 and iv.n_missing == 2
    assert iv.mean == pytest.approx(0.85)
    empty = t_interval([None, float("nan")])
    assert empty.mean is None and empty.n == 0 and empty.n_missing == 2 and empty.reason == "no values"


def test_t_interval_identical_values_is_a_point():
    iv = t_interval([0.97, 0.97, 0.97])
    assert (iv.mean, iv.low, iv.high, iv.half_width) == (0.97, 0.97, 0.97, 0.0)


@pytest.mark.parametrize("bad", [0, 1, 1.5, -0.1])
def test_t_interval_rejects_bad_confidence(bad):
    with pytest.raises(ValueError, match=re.escape("The 'confidence' parameter of t_interval must be in the range (0.0, 1.0)")):
        t_interval(ACC, bad)


def test_t_interval_rejects_non_numbers():
    with pytest.raises(TypeError, match="Expected a number or None"):
        t_interval([0.8, "0.9"])


# ----------------------------------------------------------------------------------------------- paired tests


def test_paired_comparison_matches_scipy():
    c = paired_comparison(A, B, a_name="dann", b_name="source_only")
    a = np.array([A[s] for s in sorted(A)])
    b = np.array([B[s] for s in sorted(B)])
    # reference: scipy.stats.ttest_rel (paired t-test) and scipy.stats.wilcoxon (signed-rank)
    assert c.t_test_p == pytest.approx(scipy.stats.ttest_rel(a, b).pvalue, rel=1e-10)
    assert c.wilcoxon_p == pytest.approx(scipy.stats.wilcoxon(a, b).pvalue, rel=1e-12)
    # reference: scipy.stats.t.interval on the differences
    d = a - b
    lo, hi = scipy.stats.t.interval(0.95, len(d) - 1, loc=d.mean(), scale=scipy.stats.sem(d))
    assert c.difference.mean == pytest.approx(d.mean())
    assert (c.difference.low, c.difference.high) == (pytest.approx(lo), pytest.approx(hi))
    assert (c.a, c.b, c.n, c.seeds) == ("dann", "source_only", 6, (0, 1, 2, 3, 4, 5))
    assert c.t_test_reason is None and c.wilcoxon_reason is None
    assert c.wilcoxon_min_p == pytest.approx(2 / 2 ** 6)


def test_wilcoxon_exact_p_by_enumeration():
    # reference: the exact null distribution of the signed-rank statistic, enumerated over all 2^n sign flips
    # (no ties, no zeros), independent of scipy
    d = {0: 0.031, 1: -0.012, 2: 0.044, 3: 0.027, 4: 0.005}
    c = paired_comparison(d, {k: 0.0 for k in d})
    x = np.array(list(d.values()))
    ranks = scipy.stats.rankdata(np.abs(x))
    w_plus = ranks[x > 0].sum()
    n = len(x)
    null = [sum(r for r, s in zip(ranks, signs) if s) for signs in itertools.product([0, 1], repeat=n)]
    mean = n * (n + 1) / 4
    p_exact = sum(abs(w - mean) >= abs(w_plus - mean) - 1e-12 for w in null) / 2 ** n
    assert c.wilcoxon_p == pytest.approx(p_exact)


def test_paired_comparison_pairs_by_seed_and_reports_unpaired():
    a = {0: 0.8, 1: 0.82, 2: None, 3: 0.85, 7: 0.9}
    b = {0: 0.7, 1: 0.75, 2: 0.74, 3: float("nan"), 4: 0.7}
    c = paired_comparison(a, b)
    assert c.seeds == (0, 1)
    assert set(c.unpaired_seeds) == {2, 3, 4, 7}
    # reference: scipy.stats.ttest_rel on the two pairs that remain
    assert c.t_test_p == pytest.approx(scipy.stats.ttest_rel([0.8, 0.82], [0.7, 0.75]).pvalue)


def test_all_equal_differences():
    # every difference is +0.02: t-test undefined (zero variance); the signed-rank test is defined (all ranks tie,
    # every sign positive) and its exact p is 2 / 2^n -- reference: the sign-flip count by hand, and scipy.stats.wilcoxon
    a = {0: 0.82, 1: 0.84, 2: 0.86}
    b = {0: 0.80, 1: 0.82, 2: 0.84}
    c = paired_comparison(a, b)
    assert c.t_test_p is None and "zero variance" in c.t_test_reason
    assert c.wilcoxon_p == pytest.approx(0.25)
    assert c.wilcoxon_p == pytest.approx(scipy.stats.wilcoxon([0.02, 0.02, 0.02]).pvalue)
    assert c.difference.mean == pytest.approx(0.02)


def test_identical_methods_leave_both_tests_undefined():
    a = {0: 0.8, 1: 0.7, 2: 0.9}
    c = paired_comparison(a, dict(a))
    assert c.t_test_p is None and c.wilcoxon_p is None
    assert "zero variance" in c.t_test_reason
    assert "every paired difference is zero" in c.wilcoxon_reason
    assert c.difference.mean == 0.0 and c.difference.half_width == 0.0


def test_single_pair_and_no_pairs():
    c = paired_comparison({0: 0.8}, {0: 0.7})
    assert c.n == 1 and c.t_test_p is None and "at least two" in c.t_test_reason
    assert c.difference.half_width is None and c.difference.mean == pytest.approx(0.1)
    assert c.wilcoxon_p == pytest.approx(1.0)  # one positive difference: p = 2 / 2^1 -- by hand
    none = paired_comparison({0: 0.8}, {1: 0.7})
    assert none.n == 0 and none.t_test_p is None and none.wilcoxon_p is None
    assert none.wilcoxon_reason == "no paired seeds" and none.difference.mean is None


def test_paired_comparison_rejects_sequences():
    with pytest.raises(TypeError, match=re.escape("The 'a' parameter of paired_comparison must be a mapping")):
        paired_comparison([0.8, 0.9], {0: 0.7})


# ------------------------------------------------------------------------------------------------------ ranks


def test_average_ranks_matches_rankdata():
    table = {
        "moons": {"src": 0.70, "dann": 0.80, "coral": 0.80, "mmd": 0.75},
        "blobs": {"src": 0.60, "dann": 0.55, "coral": 0.65, "mmd": 0.65},
        "digits": {"src": 0.50, "dann": 0.90, "coral": 0.70, "mmd": 0.60},
    }
    methods = ["src", "dann", "coral", "mmd"]
    r = average_ranks(table)
    # reference: scipy.stats.rankdata of the negated scores (best = rank 1, ties averaged), averaged over shifts
    ref = np.mean([scipy.stats.rankdata([-table[s][m] for m in methods]) for s in table], axis=0)
    assert [r.mean_rank[m] for m in methods] == pytest.approx(list(ref))
    # and by hand: moons dann/coral tie for 1-2 -> 1.5 each
    assert r.per_shift["moons"] == {"src": 4.0, "dann": 1.5, "coral": 1.5, "mmd": 3.0}
    assert r.shifts_used == ("moons", "blobs", "digits") and r.shifts_dropped == ()


def test_a_float32_tie_shares_the_average_rank():
    # the same mean accuracy reached in two summation orders, in float32: equal on paper, one ulp apart here
    seeds = np.array([0.8125, 0.71875, 0.9, 0.65, 0.7778], dtype=np.float32)
    a, b = float(np.float32(seeds.sum(dtype=np.float32)) / 5), float(np.float32(seeds[::-1].sum(dtype=np.float32)) / 5)
    c = float(np.mean(seeds.astype(np.float64)))
    assert len({a, b, c}) > 1  # the float noise this test is about
    table = {"moons": {"dann": a, "coral": b, "mmd": c, "src": 0.5}, "blobs": {"dann": 0.6, "coral": 0.7,
                                                                             "mmd": 0.8, "src": 0.9}}
    methods = ["dann", "coral", "mmd", "src"]
    r = average_ranks(table)
    # reference: scipy.stats.rankdata on the values rounded to 6 decimals (none lies near a rounding boundary)
    ref = np.mean([scipy.stats.rankdata([-round(table[s][m], 6) for m in methods]) for s in table], axis=0)
    assert [r.mean_rank[m] for m in methods] == pytest.approx(list(ref))
    assert r.per_shift["moons"] == {"dann": 2.0, "coral": 2.0, "mmd": 2.0, "src": 4.0}
    # genuinely different scores still rank apart, by scipy's ranks of the raw values
    spread = [0.5, 0.500002, 0.7, 0.69999]
    assert tolerant_ranks(spread).tolist() == scipy.stats.rankdata(spread).tolist()


def test_average_ranks_lower_is_better_and_missing_shift():
    table = {"a": {"x": 0.1, "y": 0.2}, "b": {"x": 0.3, "y": None}, "c": {"x": 0.5}}
    r = average_ranks(table, methods=["x", "y"], higher_is_better=False)
    assert r.mean_rank == {"x": 1.0, "y": 2.0}
    assert r.shifts_dropped == ("b", "c")
    empty = average_ranks({"b": {"x": 0.3, "y": None}})
    assert empty.mean_rank == {"x": None, "y": None} and empty.shifts_used == ()


# ------------------------------------------------------------------------------------------------ gap closed


@pytest.mark.parametrize(
    "m, src, oracle, expected",
    [
        (0.75, 0.70, 0.90, 0.25),  # by hand: 0.05 / 0.20
        (0.90, 0.70, 0.90, 1.0),
        (0.70, 0.70, 0.90, 0.0),
        (0.60, 0.70, 0.90, -0.5),  # worse than source-only: negative
        (0.95, 0.70, 0.90, 1.25),
    ],
)
def test_gap_closed_hand_numbers(m, src, oracle, expected):
    assert gap_closed(m, src, oracle) == pytest.approx(expected)


@pytest.mark.parametrize(
    "m, src, oracle",
    [(0.8, 0.9, 0.85), (0.8, 0.9, 0.9), (0.8, 0.9, 0.905), (None, 0.7, 0.9), (0.8, float("nan"), 0.9)],
)
def test_gap_closed_undefined(m, src, oracle):
    assert gap_closed(m, src, oracle) is None


def test_gap_closed_min_gap_is_adjustable():
    assert gap_closed(0.902, 0.9, 0.905, min_gap=0.001) == pytest.approx(0.4)


# ------------------------------------------------------------------------------------------------ formatting


@pytest.mark.parametrize(
    "mean, half, expected",
    [
        (82.3456, 3.1234, "82 ± 3"),           # leading digit 3: one significant digit
        (82.3456, 1.5234, "82.3 ± 1.5"),       # leading digit 1: two significant digits
        (82.3456, 0.2549, "82.35 ± 0.25"),     # leading digit 2: two significant digits
        (0.82346, 0.0123, "0.823 ± 0.012"),
        (82.3456, 34.0, "80 ± 30"),            # half-width above 10: round the mean to tens too
        (50.04, 2.96, "50 ± 3"),               # 2.96 rounds to 3.0, whose leading digit 3 calls for one digit
        (50.04, 0.96, "50.0 ± 1.0"),           # 0.96 rounds to 1.0, leading digit 1: two digits
        (0.5, 0.0025, "0.5000 ± 0.0025"),      # trailing zeros kept: they are significant
        (71.25, 0.5, "71.3 ± 0.5"),            # half away from zero, on the decimal value
        (82.3456, None, "82.35 ± n/a"),        # one seed
        (82.3456, 0.0, "82.35 ± 0"),           # identical seeds
        (None, 1.0, "n/a"),
        (-0.04, 0.3, "0.0 ± 0.3"),             # no "-0.0"
    ],
)
def test_format_mean_ci(mean, half, expected):
    assert format_mean_ci(mean, half) == expected


def test_round_sig_and_format_p():
    # reference: Python's own "%.2g" for values away from a rounding tie
    for x in (0.012345, 123.456, -0.0009876, 5.0):
        assert round_sig(x, 2) == pytest.approx(float(f"{x:.2g}"))
    assert round_sig(0.125, 2) == 0.13  # half away from zero on the decimal value (binary 0.125 is exact anyway)
    assert [format_p(p) for p in (0.0704, 0.25, 1.0, 0.00012, None)] == ["0.07", "0.25", "1", "<0.001", "n/a"]
