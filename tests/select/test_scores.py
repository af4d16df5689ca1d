"""Selection scores against closed forms, reference libraries and hand computations."""
import math
import re

import numpy as np
import pytest
import scipy.stats

from adaptkit.select import (
    SCORES,
    ScoreInputs,
    compute_scores,
    compute_scores_with_reasons,
    density_ratio,
    dev,
    dev_risk,
    info_max,
    iwcv,
    pick_best,
    reverse_validation,
    snd,
    source_val_accuracy,
    target_entropy,
)


def _sigmoid(z):
    return 1.0 / (1.0 + np.exp(-z))


def _random_run(seed=0, n_v=60, n_t=50, d=4, k=3):
    rng = np.random.default_rng(seed)
    logits_s, logits_t = rng.normal(size=(n_v, k)), rng.normal(size=(n_t, k))
    soft = lambda z: np.exp(z) / np.exp(z).sum(1, keepdims=True)  # noqa: E731
    return ScoreInputs(
        source_feats=rng.normal(size=(n_v, d)),
        source_probs=soft(logits_s),
        source_labels=rng.integers(0, k, size=n_v),
        target_feats=rng.normal(size=(n_t, d)) + 0.5,
        target_probs=soft(logits_t),
    )


# ---------------------------------------------------------------- density ratio

def test_density_ratio_matches_gaussian_closed_form():
    # Closed form: for p_s = N(μs, Σ), p_t = N(μt, Σ),
    # log p_t(x)/p_s(x) = (μt − μs)ᵀ Σ⁻¹ x − ½(μtᵀ Σ⁻¹ μt − μsᵀ Σ⁻¹ μs)  (linear in x; e.g. Bishop, PRML §4.2.1).
    # A logistic domain classifier is then well specified, so the estimate converges to it.
    rng = np.random.default_rng(0)
    mu_s, mu_t = np.array([0.0, 0.0]), np.array([1.0, -0.5])
    cov = np.array([[1.0, 0.3], [0.3, 0.5]])
    chol = np.linalg.cholesky(cov)
    xs = rng.normal(size=(3000, 2)) @ chol.T + mu_s
    xt = rng.normal(size=(3000, 2)) @ chol.T + mu_t
    at = rng.normal(size=(500, 2)) @ chol.T + mu_s  # fresh source points
    prec = np.linalg.inv(cov)
    true_log = at @ prec @ (mu_t - mu_s) - 0.5 * (mu_t @ prec @ mu_t - mu_s @ prec @ mu_s)

    est_log = np.log(density_ratio(xs, xt, at=at))
    err = np.abs(est_log - true_log)
    # tolerance: 3000 samples per domain give coefficient errors of a few 1e-2; the true log ratio spans ~[-6, 3].
    # Over 30 data seeds the worst median error was 0.095 and the worst max error 0.46; the bounds leave room.
    assert np.median(err) < 0.15
    assert err.max() < 0.75


def test_density_ratio_clip_and_normalize():
    rng = np.random.default_rng(1)
    xs, xt = rng.normal(size=(400, 1)), rng.normal(size=(400, 1)) + 2.0
    raw = density_ratio(xs, xt)
    clipped = density_ratio(xs, xt, clip=3.0)
    assert raw.max() > 3.0 and clipped.max() == pytest.approx(3.0)
    np.testing.assert_allclose(clipped, np.minimum(raw, 3.0))
    normed = density_ratio(xs, xt, clip=3.0, normalize=True)
    assert normed.mean() == pytest.approx(1.0)
    np.testing.assert_allclose(normed, clipped / clipped.mean())


# ---------------------------------------------------------------- IWCV and DEV

@pytest.mark.parametrize("score", [iwcv, dev], ids=["iwcv", "dev"])
def test_importance_weighted_risk_estimates_target_risk(score):
    # Importance-sampling identity E_s[w(x)·ℓ(x, y)] = E_t[ℓ(x, y)] under covariate shift (p(y|x) shared)
    # (Shimodaira, J. Stat. Plan. Inference 2000; Sugiyama et al., JMLR 2007). The true target risk is computed
    # here from labelled target samples the score never sees.
    rng = np.random.default_rng(0)
    n = 3000
    xs, xt = rng.normal(size=(n, 1)), rng.normal(size=(n, 1)) + 1.0
    ys = (rng.random(n) < _sigmoid(3 * xs[:, 0] - 1)).astype(int)
    yt = (rng.random(n) < _sigmoid(3 * xt[:, 0] - 1)).astype(int)

    def model(x):  # a fixed, imperfect classifier
        p1 = _sigmoid(x[:, 0] + 1.0)
        return np.stack([1 - p1, p1], axis=1)

    ce = lambda p, y: -np.log(p[np.arange(len(y)), y])  # noqa: E731
    target_risk = ce(model(xt), yt).mean()
    plain = ce(model(xs), ys).mean()
    est = score(xs, model(xs), ys, xt)
    assert abs(plain - target_risk) > 0.2  # the shift matters
    assert abs(est - target_risk) < 0.05
    assert abs(est - target_risk) < 0.25 * abs(plain - target_risk)


def test_iwcv_is_mean_of_normalised_weights_times_loss():
    run = _random_run(3)
    y = run.source_labels
    ell = -np.log(run.source_probs[np.arange(len(y)), y])
    w = density_ratio(run.source_feats, run.target_feats, clip=10.0, normalize=True)
    assert iwcv(run.source_feats, run.source_probs, y, run.target_feats) == pytest.approx(np.mean(w * ell))


def test_dev_control_variate_on_fixed_numbers():
    # Direct computation of DEV (You et al., ICML 2019): L = w·ℓ, W = w, η = −Cov(L,W)/Var(W),
    # R = mean(L) + η·mean(W) − η, with n − 1 in covariance and variance.
    losses = [0.5, 1.0, 2.0, 0.1]
    weights = [0.8, 1.5, 0.5, 1.6]
    # L = [0.4, 1.5, 1.0, 0.16]; mean L = 3.06/4 = 0.765; mean W = 4.4/4 = 1.1
    # L − mean L = [−0.365, 0.735, 0.235, −0.605];  W − mean W = [−0.3, 0.4, −0.6, 0.5]
    # Cov = (0.1095 + 0.294 − 0.141 − 0.3025)/3 = −0.04/3;  Var = (0.09 + 0.16 + 0.36 + 0.25)/3 = 0.86/3
    # η = 0.04/0.86;  R = 0.765 + η·(1.1 − 1)
    eta = 0.04 / 0.86
    expected = 0.765 + eta * 0.1
    assert expected == pytest.approx(0.7696511627906977)
    assert dev_risk(losses, weights) == pytest.approx(expected, rel=1e-12)


def test_dev_reduces_to_mean_when_weights_average_one_or_are_constant():
    losses = np.array([0.3, 2.0, 0.7])
    w = np.array([0.5, 1.5, 1.0])  # mean exactly 1: η·mean(W) − η = 0
    assert dev_risk(losses, w) == pytest.approx(np.mean(w * losses))
    assert dev_risk(losses, np.full(3, 2.0)) == pytest.approx(np.mean(2.0 * losses))  # Var(W) = 0 → η = 0


# ---------------------------------------------------------------- entropy, information maximisation, SND

def test_target_entropy_matches_scipy():
    # Reference: scipy.stats.entropy (natural log) per row, averaged.
    rng = np.random.default_rng(0)
    p = rng.dirichlet(np.ones(5) * 0.5, size=40)
    p[0] = [1.0, 0.0, 0.0, 0.0, 0.0]  # 0·log 0 = 0
    assert target_entropy(p) == pytest.approx(np.mean(scipy.stats.entropy(p, axis=1)), rel=1e-12)


def test_info_max_matches_direct_numpy():
    rng = np.random.default_rng(1)
    p = rng.dirichlet(np.ones(4), size=30)
    p_bar = p.mean(0)
    expected = -np.sum(p_bar * np.log(p_bar)) - np.mean(-np.sum(p * np.log(p), axis=1))
    assert info_max(p) == pytest.approx(expected, rel=1e-12)
    assert info_max(np.tile([[0.25, 0.25, 0.25, 0.25]], (10, 1))) == pytest.approx(0.0, abs=1e-12)


def test_snd_identical_predictions_is_log_of_neighbour_count():
    # All similarities equal → softmax uniform over n − 1 neighbours → entropy log(n − 1).
    p = np.tile([[0.7, 0.2, 0.1]], (6, 1))
    assert snd(p) == pytest.approx(math.log(5))


def test_snd_two_one_hot_groups_by_hand():
    # Two groups of m = 3 identical one-hot predictions (classes 0 and 1). For any row: 2 neighbours with cosine 1,
    # 3 with cosine 0. Softmax at τ = 0.05: a = e^20 / (2e^20 + 3) each, b = 1 / (2e^20 + 3) each.
    # SND = −2·a·log a − 3·b·log b (the same for every row).
    p = np.array([[1.0, 0.0]] * 3 + [[0.0, 1.0]] * 3)
    z = 2 * math.exp(20) + 3
    a, b = math.exp(20) / z, 1 / z
    expected = -2 * a * math.log(a) - 3 * b * math.log(b)
    assert snd(p) == pytest.approx(expected, rel=1e-9)
    assert snd(p, chunk=2) == pytest.approx(expected, rel=1e-9)  # chunking does not change the value


# ---------------------------------------------------------------- reverse validation

def _two_blobs(rng, n, shift=0.0):
    """Two Gaussian classes at ±(2, 0), moved by ``shift`` along the second axis; labels 0/1."""
    y = rng.integers(0, 2, size=n)
    x = rng.normal(size=(n, 2)) + np.stack([4.0 * y - 2.0, np.full(n, shift)], axis=1)
    return x, y


def test_reverse_validation_equals_a_scikit_learn_computation_by_hand():
    # Reverse validation (Zhong et al., ECML PKDD 2010; Ganin et al., JMLR 2016 §5.1.2): fit on the target with the
    # run's pseudo-labels, score on labelled source validation. The reference is scikit-learn itself.
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    run = _random_run(4, n_v=80, n_t=70)
    pseudo = run.target_probs.argmax(1)
    ref = make_pipeline(StandardScaler(), LogisticRegression(C=1.0, max_iter=1000, random_state=0))
    ref.fit(run.target_feats, pseudo)
    expected = np.mean(ref.predict(run.source_feats) == run.source_labels)
    got = reverse_validation(run.source_feats, run.source_labels, run.target_feats, run.target_probs)
    assert got == expected
    assert compute_scores(run, ["reverse_validation"]) == {"reverse_validation": expected}
    assert SCORES["reverse_validation"].higher_is_better


def test_reverse_validation_ranks_right_pseudo_labels_above_permuted_ones():
    rng = np.random.default_rng(0)
    xs, ys = _two_blobs(rng, 200)
    xt, yt = _two_blobs(rng, 200, shift=1.0)
    right = np.eye(2)[yt] * 0.8 + 0.1  # confident and right on the target
    swapped = np.eye(2)[1 - yt] * 0.8 + 0.1  # as confident, every class renamed (a label permutation)
    good = reverse_validation(xs, ys, xt, right)
    bad = reverse_validation(xs, ys, xt, swapped)
    # the blobs are ~4σ apart: the reverse classifier recovers the source nearly always, or its exact opposite
    assert good > 0.95 and bad < 0.05


def test_reverse_validation_with_one_pseudo_class_is_none_with_a_reason():
    run = _random_run(0)
    one_class = np.tile([[0.2, 0.7, 0.1]], (len(run.target_feats), 1))
    collapsed = ScoreInputs(**{**vars(run), "target_probs": one_class})
    values, reasons = compute_scores_with_reasons(collapsed, ["reverse_validation"])
    assert values == {"reverse_validation": None}
    assert reasons["reverse_validation"] == (
        "reverse_validation needs at least two pseudo-classes on the target to fit a reverse classifier; every "
        "target sample is predicted class 1")


def test_reverse_validation_refuses_mismatched_rows():
    run = _random_run(0)
    with pytest.raises(ValueError, match=re.escape(
        "The 'target_probs' and 'target_feats' inputs of reverse_validation must have the same number of rows. "
        "Got 49 and 50.")):
        reverse_validation(run.source_feats, run.source_labels, run.target_feats, run.target_probs[:-1])


def test_source_val_accuracy():
    assert source_val_accuracy([[0.9, 0.1], [0.2, 0.8], [0.6, 0.4]], [0, 1, 1]) == pytest.approx(2 / 3)


# ---------------------------------------------------------------- the table, the runner, torch inputs

@pytest.mark.parametrize("name", list(SCORES), ids=list(SCORES))
def test_every_score_is_finite_and_accepts_torch(name):
    torch = pytest.importorskip("torch")
    run = _random_run(0)
    values = compute_scores(run, [name])
    assert set(values) == {name} and np.isfinite(values[name])
    as_torch = ScoreInputs(**{
        f: (torch.as_tensor(v, dtype=torch.float32) if f != "source_labels" else torch.as_tensor(v))
        for f, v in vars(run).items()
    })
    assert compute_scores(as_torch, [name])[name] == pytest.approx(values[name], rel=1e-4, abs=1e-5)


@pytest.mark.parametrize("name", list(SCORES), ids=list(SCORES))
def test_every_score_is_none_without_its_inputs(name):
    values, reasons = compute_scores_with_reasons(ScoreInputs(), [name])
    assert values == {name: None}
    assert reasons[name].startswith(f"{name} needs ")


def test_missing_score_is_none_not_zero():
    run = _random_run(0)
    only_target = ScoreInputs(target_probs=run.target_probs)
    values, reasons = compute_scores_with_reasons(only_target)
    assert values["iwcv"] is None and values["dev"] is None and values["source_val_accuracy"] is None
    assert values["info_max"] is not None and values["snd"] is not None and values["target_entropy"] is not None
    assert reasons["iwcv"] == (
        "iwcv needs source_feats, source_probs, source_labels, target_feats, which the run did not provide"
    )
    assert set(reasons) == {"iwcv", "dev", "source_val_accuracy", "reverse_validation"}
    assert values["reverse_validation"] is None


def test_unknown_score_name_lists_available():
    with pytest.raises(ValueError, match=re.escape(
        "Unknown selection score 'snd2'. Available selection scores: source_val_accuracy, iwcv, dev, "
        "target_entropy, info_max, snd, reverse_validation."
    )):
        compute_scores(ScoreInputs(), ["snd2"])


def test_pick_best_respects_direction_and_skips_missing():
    cands = [{"iwcv": 0.9, "info_max": 0.1}, {"iwcv": None, "info_max": 0.5}, {"iwcv": 0.4, "info_max": None}]
    assert pick_best(cands, "iwcv") == 2  # lower is better
    assert pick_best(cands, "info_max") == 1  # higher is better
    assert pick_best([{"dev": None}], "dev") is None


def test_pick_best_takes_the_prefix_that_summaries_and_select_use():
    finals = [{"score/iwcv": 0.9}, {"score/iwcv": 0.4}]  # as in summary["final"] and the history
    assert pick_best(finals, "score/iwcv") == pick_best(finals, "iwcv") == 1
    with pytest.raises(ValueError, match="Unknown selection score 'accuracy'"):
        pick_best(finals, "score/accuracy")


# ---------------------------------------------------------------- bad inputs

def test_single_target_sample_is_rejected():
    with pytest.raises(ValueError, match=re.escape(
        "The 'target_probs' input of snd needs at least 2 samples (a sample needs at least one neighbour). Got 1."
    )):
        snd([[0.5, 0.5]])
    with pytest.raises(ValueError, match=re.escape(
        "The 'target_probs' input of info_max needs at least 2 samples "
        "(one target sample says nothing about the target distribution). Got 1."
    )):
        info_max([[0.5, 0.5]])


def test_empty_domain_is_rejected():
    run = _random_run(0)
    with pytest.raises(ValueError, match=re.escape(
        "The 'target_feats' input of iwcv is empty (0 samples): an empty domain cannot be scored."
    )):
        iwcv(run.source_feats, run.source_probs, run.source_labels, np.zeros((0, 4)))


def test_nan_features_are_rejected_even_through_compute_scores():
    run = _random_run(0)
    feats = run.source_feats.copy()
    feats[3, 1] = np.nan
    msg = re.escape("The 'source_feats' input of dev contains NaN or infinite values (1 of 240 entries).")
    with pytest.raises(ValueError, match=msg):
        dev(feats, run.source_probs, run.source_labels, run.target_feats)
    bad_run = ScoreInputs(**{**vars(run), "source_feats": feats})
    with pytest.raises(ValueError, match=msg):
        compute_scores(bad_run, ["dev"])


def test_logits_and_bad_labels_are_rejected():
    with pytest.raises(ValueError, match=re.escape(
        "The 'target_probs' input of target_entropy must hold class probabilities (non-negative rows summing to 1)"
    )):
        target_entropy([[2.0, -1.0], [0.3, 0.1]])
    with pytest.raises(ValueError, match=re.escape(
        "The 'source_labels' input of source_val_accuracy must hold class indices in [0, 1] "
        "(unlabelled rows, -1, have no place here). Got values in [-1, 1]."
    )):
        source_val_accuracy([[0.9, 0.1], [0.2, 0.8]], [-1, 1])
