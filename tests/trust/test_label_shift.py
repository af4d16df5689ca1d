"""Label-shift estimation (adaptkit/trust/label_shift.py) against known proportions and the papers' closed forms."""
import re

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression

from adaptkit.trust import bbse, calibrate, em_priors, estimate_label_shift

MEANS = np.array([[0.0, 0.0], [2.0, 0.0], [0.0, 2.0]])  # three overlapping Gaussian classes (unit variance)


def _draw(priors, n, rng):
    y = rng.choice(len(priors), size=n, p=priors)
    return MEANS[y] + rng.standard_normal((n, 2)), y


def _label_shift(target_priors, seed=0, n=3000):
    """A synthetic label shift: p(x | y) fixed, class priors uniform on the source and `target_priors` on the
    target; a logistic regression (scikit-learn) trained on a separate source draw is the black box."""
    rng = np.random.default_rng(seed)
    src = [1 / 3] * 3
    xtr, ytr = _draw(src, n, rng)
    xv, yv = _draw(src, n // 2, rng)
    xt, _ = _draw(target_priors, n, rng)
    clf = LogisticRegression(max_iter=1000).fit(xtr, ytr)
    return clf.predict_proba(xv), yv, clf.predict_proba(xt)


@pytest.mark.parametrize("target", [[0.6, 0.3, 0.1], [0.1, 0.1, 0.8], [1 / 3] * 3])
def test_bbse_and_em_recover_known_proportions(target):
    # tolerance 0.04 per class: the estimators' sampling error at n = 1500 + 3000 is about 0.01-0.02 here
    pv, yv, pt = _label_shift(target)
    for estimator in ("bbse", "em"):
        est = estimate_label_shift(pv, yv, pt, estimator=estimator, n_bootstrap=100)
        np.testing.assert_allclose(est.target_proportions, target, atol=0.04, err_msg=estimator)
        assert all(lo <= t + 0.04 and t - 0.04 <= hi
                   for lo, t, hi in zip(est.interval_low, target, est.interval_high))
        assert est.shifted == (target != [1 / 3] * 3)


def test_bbse_equals_the_closed_form_on_a_hand_made_confusion_matrix():
    # Lipton et al. 2018: w = C^-1 mu with C[i, j] = P(yhat = i, y = j) and mu[i] = P_t(yhat = i)
    yhat_s = np.array([0] * 8 + [1] * 2 + [0] * 3 + [1] * 7)  # class 0: 8 right, 2 wrong; class 1: 3 wrong, 7 right
    y_s = np.array([0] * 10 + [1] * 10)
    yhat_t = np.array([0] * 14 + [1] * 6)
    c = np.array([[8, 3], [2, 7]]) / 20.0
    mu = np.array([14, 6]) / 20.0
    w = np.linalg.solve(c, mu)  # numpy's solver as the reference
    out = bbse(np.eye(2)[yhat_s], y_s, np.eye(2)[yhat_t])
    np.testing.assert_allclose(out["ratios"], w, rtol=1e-12)
    np.testing.assert_allclose(out["proportions"], w * 0.5 / (w * 0.5).sum(), rtol=1e-12)


def test_em_fixed_point_satisfies_the_saerens_equations():
    # at the fixed point, pi = mean_x normalise((pi / pi_s) * p(y|x))
    rng = np.random.default_rng(1)
    p = rng.dirichlet([1.0, 1.0, 1.0], size=200)
    src = np.array([0.2, 0.3, 0.5])
    pi = np.asarray(em_priors(p, src, tol=1e-12)["proportions"])
    post = p * (pi / src)
    post /= post.sum(1, keepdims=True)
    np.testing.assert_allclose(post.mean(0), pi, atol=1e-9)


def test_calibration_lowers_the_nll_of_overconfident_probabilities():
    from sklearn.metrics import log_loss

    pv, yv, _ = _label_shift([1 / 3] * 3)
    sharp = pv ** 4 / (pv ** 4).sum(1, keepdims=True)  # overconfident copy
    cal = calibrate(sharp, yv)
    assert log_loss(yv, cal(sharp)) < log_loss(yv, sharp) - 0.05
    assert cal.temperature > 2.0  # undoes most of the sharpening (the exact undo is T = 4)


def test_too_few_samples_a_missing_class_and_singular_matrices():
    p = np.eye(3)[[0, 1, 2] * 5]
    with pytest.raises(ValueError, match=re.escape("class 2 has 3 labelled source-validation sample(s); at least 5")):
        few = [0] * 6 + [1] * 6 + [2] * 3
        estimate_label_shift(np.eye(3)[few], few, p)
    with pytest.raises(ValueError, match="class 1 is absent from the labelled source-validation samples"):
        estimate_label_shift(p, [0, 2, 2] * 5, p)
    # a classifier that never predicts class 2: BBSE is impossible, EM is used and the notes say so
    never = np.array([[0.7, 0.2, 0.1], [0.2, 0.7, 0.1], [0.45, 0.4, 0.15]])[[0, 1, 2] * 10]
    est = estimate_label_shift(never, [0, 1, 2] * 10, never[:20], n_bootstrap=20)
    assert est.estimator == "em" and any("used EM prior re-estimation instead of BBSE" in n for n in est.notes)


def test_exploding_ratios_are_capped_and_said():
    # a target made almost only of a class that is rare in the source: its ratio would be about 50
    yv = np.array([0] * 98 + [1] * 6)
    pv = np.eye(2)[yv]
    pt = np.eye(2)[[1] * 99 + [0]]
    est = estimate_label_shift(pv, yv, pt, n_bootstrap=10, max_ratio=10)
    assert max(est.ratios) <= 10 + 1e-9
    assert any("capped" in n for n in est.notes)


def test_a_change_in_how_classes_look_makes_the_estimate_unreliable_not_shifted():
    # covariate shift with equal priors: every target point is pulled halfway to the centre of the classes, so the
    # classes look different (p(x | y) changed) and predictions lose confidence. Hard-label BBSE and EM on the
    # calibrated probabilities both assume p(x | y) is unchanged, read the change differently, and disagree.
    rng = np.random.default_rng(0)
    xtr, ytr = _draw([1 / 3] * 3, 3000, rng)
    xv, yv = _draw([1 / 3] * 3, 1500, rng)
    xt, _ = _draw([1 / 3] * 3, 3000, rng)
    xt = MEANS.mean(0) + 0.5 * (xt - MEANS.mean(0))
    clf = LogisticRegression(max_iter=1000).fit(xtr, ytr)
    est = estimate_label_shift(clf.predict_proba(xv), yv, clf.predict_proba(xt), n_bootstrap=50)
    assert not est.reliable and est.disagreement > 0.1 and not est.shifted
    assert any("BBSE and EM disagree" in n for n in est.notes)
