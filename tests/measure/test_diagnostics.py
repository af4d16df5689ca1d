"""Domain distances, calibration and the label-shift alarm against formulas and hand computations."""
import re
import warnings

import numpy as np
import pytest

from adaptkit.measure import (
    LabelShiftWarning,
    accuracy,
    coral_between,
    expected_calibration_error,
    label_shift_check,
    mmd2_between,
    proxy_a_distance,
    relative_to_source_halves,
    shift_report,
)


# ---------------------------------------------------------------- proxy A-distance

def test_proxy_a_distance_near_zero_for_one_distribution():
    # Ben-David et al. (NeurIPS 2007): ε ≈ ½ when the domains are indistinguishable → d_A = 2(1 − 2ε) ≈ 0.
    # Wide margin: the min over the C grid and 500 held-out points can push ε a few points below ½.
    rng = np.random.default_rng(0)
    a, b = rng.normal(size=(500, 5)), rng.normal(size=(500, 5))
    assert 0.0 <= proxy_a_distance(a, b) < 0.3


def test_proxy_a_distance_near_two_for_separated_domains():
    # Linearly separable domains: ε ≈ 0 → d_A ≈ 2.
    rng = np.random.default_rng(1)
    a = rng.normal(size=(500, 5))
    b = rng.normal(size=(300, 5)) + np.array([8.0, 0, 0, 0, 0])  # unequal sizes: balanced by subsampling
    assert proxy_a_distance(a, b) > 1.9


def test_proxy_a_distance_is_deterministic_and_in_range():
    rng = np.random.default_rng(2)
    a, b = rng.normal(size=(120, 3)), rng.normal(size=(100, 3)) + 0.7
    v = proxy_a_distance(a, b, seed=5)
    assert v == proxy_a_distance(a, b, seed=5)
    assert 0.0 <= v <= 2.0


# ---------------------------------------------------------------- MMD² and CORAL

def _gauss(x, y, gamma):
    # adaptkit's one bandwidth convention: k = exp(−‖x−y‖²/γ), γ in squared-distance units (DAN's form, Long et al.,
    # ICML 2015, §3), as in the training loss adaptkit.losses.mmd2
    return np.exp(-np.sum((x - y) ** 2) / gamma)


def _mmd2_loops(a, b, gamma, unbiased):
    # Gretton et al., JMLR 13 (2012): eq. 5 (biased, V-statistic) and eq. 3 (unbiased, U-statistic), by loops.
    m, n = len(a), len(b)
    kaa = sum(_gauss(a[i], a[j], gamma) for i in range(m) for j in range(m) if not (unbiased and i == j))
    kbb = sum(_gauss(b[i], b[j], gamma) for i in range(n) for j in range(n) if not (unbiased and i == j))
    kab = sum(_gauss(a[i], b[j], gamma) for i in range(m) for j in range(n))
    if unbiased:
        return kaa / (m * (m - 1)) + kbb / (n * (n - 1)) - 2 * kab / (m * n)
    return kaa / m ** 2 + kbb / n ** 2 - 2 * kab / (m * n)


@pytest.mark.parametrize("unbiased", [False, True], ids=["biased", "unbiased"])
def test_mmd2_matches_double_loop(unbiased):
    rng = np.random.default_rng(0)
    a, b = rng.normal(size=(7, 3)), rng.normal(size=(5, 3)) + 0.5
    assert mmd2_between(a, b, bandwidth=1.3, unbiased=unbiased) == pytest.approx(
        _mmd2_loops(a, b, 1.3, unbiased), rel=1e-10)


def test_mmd2_median_heuristic_bandwidth():
    # Median heuristic (Gretton et al. 2012, §8) on squared distances: γ = median squared distance between distinct
    # points of the pooled sample (10 points: 45 pairs, an odd count, so the median is one of them).
    rng = np.random.default_rng(1)
    a, b = rng.normal(size=(6, 2)), rng.normal(size=(4, 2)) + 1.0
    x = np.concatenate([a, b])
    sq_dists = [np.sum((x[i] - x[j]) ** 2) for i in range(len(x)) for j in range(i + 1, len(x))]
    gamma = float(np.median(sq_dists))
    assert mmd2_between(a, b) == pytest.approx(_mmd2_loops(a, b, gamma, unbiased=False), rel=1e-10)


def test_mmd2_diagnostic_is_the_training_loss():
    # one MMD in the library: the diagnostic and the training loss agree at one kernel, median bandwidth included
    import torch

    from adaptkit.losses import mmd2

    rng = np.random.default_rng(3)
    a, b = rng.normal(size=(9, 3)), rng.normal(size=(8, 3)) + 0.4
    for unbiased in (False, True):
        loss = mmd2(torch.from_numpy(a), torch.from_numpy(b), "unbiased" if unbiased else "biased", n_kernels=1)
        assert mmd2_between(a, b, unbiased=unbiased) == pytest.approx(float(loss), rel=1e-12)


def test_mmd2_zero_for_identical_sets_and_grows_with_shift():
    rng = np.random.default_rng(2)
    a = rng.normal(size=(50, 3))
    assert mmd2_between(a, a) == pytest.approx(0.0, abs=1e-12)
    assert mmd2_between(a, a + 3.0) > mmd2_between(a, a + 0.5) > 0


def test_coral_matches_sun_saenko_formula():
    # Sun & Saenko (2016), eqs. 1–3: C = (DᵀD − (1ᵀD)ᵀ(1ᵀD)/n)/(n − 1); ℓ = ‖C_S − C_T‖²_F / (4d²).
    rng = np.random.default_rng(0)
    a, b = rng.normal(size=(30, 4)), rng.normal(size=(20, 4)) * [1.0, 2.0, 0.5, 1.0]

    def cov(d):
        ones = np.ones((1, len(d)))
        return (d.T @ d - (ones @ d).T @ (ones @ d) / len(d)) / (len(d) - 1)

    expected = np.sum((cov(a) - cov(b)) ** 2) / (4 * 4 ** 2)
    assert coral_between(a, b) == pytest.approx(expected, rel=1e-10)


def test_shift_report_keys_and_change():
    rng = np.random.default_rng(0)
    s, t = rng.normal(size=(200, 2)), rng.normal(size=(200, 2)) + 3.0
    r = shift_report({"source": s, "target": t}, (s, t - 3.0))
    raw = {f"{tag}/{k}" for tag in ("before", "after") for k in ("proxy_a_distance", "mmd2", "coral")}
    relative = {f"{tag}/{k}_over_source_halves" for tag in ("before", "after", "change") for k in ("mmd2", "coral")}
    # no change of the raw MMD² / CORAL: input and feature space are not comparable in those units
    assert set(r) == raw | relative | {"change/proxy_a_distance"}
    assert r["before/proxy_a_distance"] > 1.5 and r["after/proxy_a_distance"] < 0.5
    assert r["change/mmd2_over_source_halves"] == pytest.approx(
        r["after/mmd2_over_source_halves"] - r["before/mmd2_over_source_halves"])
    assert r["before/mmd2_over_source_halves"] > 10 and r["after/mmd2_over_source_halves"] < 10
    with pytest.raises(ValueError, match=re.escape("The 'after' input of shift_report must have keys 'source' and 'target'. Got keys ['src', 'tgt'].")):
        shift_report((s, t), {"src": s, "tgt": t})


def test_shift_report_change_ignores_a_rescaled_feature_space():
    # An encoder that only multiplies its inputs by 0.01 aligns nothing. The raw CORAL distance shrinks by 0.01⁴
    # (covariances scale by s², Sun & Saenko 2016 eq. 1), so after − before of the raw values would report a large
    # "improvement"; the halves-normalised change must stay 0.
    rng = np.random.default_rng(1)
    s, t = rng.normal(size=(300, 3)), rng.normal(size=(300, 3)) * [1.0, 3.0, 1.0] + 1.0
    r = shift_report((s, t), (0.01 * s, 0.01 * t))
    assert r["after/coral"] == pytest.approx(r["before/coral"] * 1e-8, rel=1e-6)
    assert r["change/coral_over_source_halves"] == pytest.approx(0.0, abs=1e-9)
    assert r["change/mmd2_over_source_halves"] == pytest.approx(0.0, abs=1e-9)
    assert "change/coral" not in r and "change/mmd2" not in r


def test_relative_to_source_halves_matches_numpy_by_hand():
    # The documented procedure, written out with numpy: permutation → halves A, B of h rows; h target rows;
    # CORAL by Sun & Saenko (2016) eqs. 1–3 with numpy's covariance; biased MMD² (Gretton et al. 2012, eq. 5) with
    # one Gaussian kernel exp(−‖x−y‖²/γ), γ = lower median of the pooled off-diagonal squared distances.
    rng = np.random.default_rng(2)
    s, t = rng.normal(size=(41, 3)), rng.normal(size=(15, 3)) * 2.0 + 0.5
    got = relative_to_source_halves(s, t, seed=7)
    draw = np.random.default_rng(7)
    h = min(41 // 2, 15)
    perm = draw.permutation(41)
    a, b, tt = s[perm[:h]], s[perm[h:2 * h]], t[draw.choice(15, h, replace=False)]

    def coral(x, y):
        return np.sum((np.cov(x, rowvar=False) - np.cov(y, rowvar=False)) ** 2) / (4 * 3 ** 2)

    pooled = np.concatenate([a, b, tt])
    sq = ((pooled[:, None] - pooled[None]) ** 2).sum(-1)[~np.eye(len(pooled), dtype=bool)]
    gamma = np.sort(sq)[(sq.size - 1) // 2]

    def mmd(x, y):
        k = lambda u, v: np.exp(-((u[:, None] - v[None]) ** 2).sum(-1) / gamma)
        return k(x, x).mean() + k(y, y).mean() - 2 * k(x, y).mean()

    assert got["coral_over_source_halves"] == pytest.approx(coral(a, tt) / coral(a, b), rel=1e-9)
    assert got["mmd2_over_source_halves"] == pytest.approx(mmd(a, tt) / mmd(a, b), rel=1e-9)


def test_relative_to_source_halves_is_about_one_without_shift():
    # Both terms compare h rows with h rows, so with no shift the ratio's average is near 1 (not 0.5 or 2).
    rng = np.random.default_rng(3)
    ratios = [relative_to_source_halves(rng.normal(size=(400, 3)), rng.normal(size=(200, 3)), seed=k)
              for k in range(20)]
    for key in ("mmd2_over_source_halves", "coral_over_source_halves"):
        assert 0.7 < np.mean([r[key] for r in ratios]) < 1.4
    with pytest.raises(ValueError, match=re.escape("The 'source' input of relative_to_source_halves needs at least 4 "
                                                   "samples (two halves of at least two rows each). Got 3.")):
        relative_to_source_halves(np.zeros((3, 2)), np.zeros((5, 2)))


# ---------------------------------------------------------------- calibration and accuracy

def test_ece_hand_case():
    # Guo et al. (ICML 2017), eq. 3 with 15 equal-width bins. Confidences 0.9 (bin 14: (13/15, 14/15]) — one right,
    # one wrong — and 0.7 (bin 11: (10/15, 11/15]) — both right:
    # ECE = 2/4·|0.5 − 0.9| + 2/4·|1.0 − 0.7| = 0.2 + 0.15 = 0.35.
    probs = [[0.9, 0.1], [0.9, 0.1], [0.3, 0.7], [0.3, 0.7]]
    labels = [0, 1, 1, 1]
    assert expected_calibration_error(probs, labels) == pytest.approx(0.35)
    # one bin: |accuracy − mean confidence| = |0.75 − 0.8|
    assert expected_calibration_error(probs, labels, n_bins=1) == pytest.approx(0.05)
    assert accuracy(probs, labels) == pytest.approx(0.75)


def test_ece_zero_when_confidence_equals_accuracy():
    probs = [[0.75, 0.25]] * 4
    assert expected_calibration_error(probs, [0, 0, 0, 1]) == pytest.approx(0.0, abs=1e-12)


def test_ece_rejects_bad_bins():
    with pytest.raises(ValueError, match=re.escape(
        "The 'n_bins' parameter of expected_calibration_error must be in the range [1, inf). Got 0 instead."
    )):
        expected_calibration_error([[1.0, 0.0]], [0], n_bins=0)


# ---------------------------------------------------------------- label shift

def test_label_shift_warning_fires_for_swapped_proportions():
    source_labels = np.array([0] * 80 + [1] * 20)
    target_probs = np.array([[0.9, 0.1]] * 20 + [[0.1, 0.9]] * 80)  # predicted proportions 0.26 / 0.74
    with pytest.warns(LabelShiftWarning, match="total variation 0.540"):
        rec = label_shift_check(target_probs, source_labels=source_labels)
    assert rec.shifted and rec.total_variation == pytest.approx(0.54)
    np.testing.assert_allclose(rec.source_proportions, [0.8, 0.2])
    np.testing.assert_allclose(rec.target_proportions, [0.26, 0.74])


def test_label_shift_silent_for_matched_proportions():
    target_probs = np.array([[0.95, 0.05]] * 80 + [[0.15, 0.85]] * 20)  # predicted proportions 0.79 / 0.21
    with warnings.catch_warnings():
        warnings.simplefilter("error", LabelShiftWarning)
        rec = label_shift_check(target_probs, source_proportions=[0.8, 0.2])
    assert not rec.shifted and rec.total_variation == pytest.approx(0.01)


def test_label_shift_check_needs_exactly_one_source():
    with pytest.raises(ValueError, match=re.escape(
        "label_shift_check needs exactly one of 'source_labels' or 'source_proportions'."
    )):
        label_shift_check([[0.5, 0.5], [0.5, 0.5]])
    with pytest.raises(ValueError, match=re.escape(
        "The 'source_proportions' input of label_shift_check must be 2 non-negative numbers summing to 1"
    )):
        label_shift_check([[0.5, 0.5]], source_proportions=[0.5, 0.6])


# ---------------------------------------------------------------- bad inputs

def test_distance_bad_inputs():
    rng = np.random.default_rng(0)
    a = rng.normal(size=(10, 3))
    with pytest.raises(ValueError, match=re.escape(
        "The 'feats_b' input of proxy_a_distance is empty (0 samples): an empty domain cannot be scored."
    )):
        proxy_a_distance(a, np.zeros((0, 3)))
    with pytest.raises(ValueError, match=re.escape(
        "The 'feats_a' and 'feats_b' inputs of coral_between must have the same number of columns. Got 3 and 2."
    )):
        coral_between(a, a[:, :2])
    nan = a.copy()
    nan[0, 0] = np.inf
    with pytest.raises(ValueError, match=re.escape(
        "The 'feats_a' input of mmd2_between contains NaN or infinite values (1 of 30 entries)."
    )):
        mmd2_between(nan, a)
