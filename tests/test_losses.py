"""The pure alignment losses, each checked against a formula or library outside adaptkit (named beside the check)."""
import math
import re

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from scipy.spatial.distance import pdist
from scipy.special import expit, rel_entr, softmax
from sklearn.metrics import log_loss
from sklearn.metrics.pairwise import rbf_kernel

from scipy.stats import entropy as scipy_entropy

from adaptkit.losses import (
    DIVERGENCES, confusion_loss, coral_distance, domain_bce, domain_cross_entropy, entropy_weights, get_divergence,
    grad_reverse, info_max_loss, inverted_label_loss, l1_discrepancy, mean_entropy, mmd2, multilinear_map, prediction_entropy,
    randomized_multilinear_map, symmetric_kl,
)
from adaptkit.train.schedules import dann_ramp

torch.set_num_threads(1)


def _t(a):
    return torch.as_tensor(a, dtype=torch.float64)


@pytest.fixture
def xy():
    rng = np.random.default_rng(0)
    return rng.normal(size=(7, 3)), rng.normal(loc=0.5, size=(5, 3))


# -- MMD² ------------------------------------------------------------------------------------------------------
GAMMAS = [0.5, 2.0, 8.0]  # bandwidths γ of exp(−‖x−y‖²/γ); sklearn's rbf_kernel uses gamma = 1/γ


def _k(a, b):
    return np.mean([rbf_kernel(a, b, gamma=1.0 / g) for g in GAMMAS], axis=0)


def test_mmd2_biased_matches_sklearn_rbf(xy):
    x, y = xy
    m, n = len(x), len(y)
    # Gretton et al., JMLR 2012, §2.2: MMD²_b = 1/m² ΣΣ k(x,x') + 1/n² ΣΣ k(y,y') − 2/(mn) ΣΣ k(x,y)
    ref = _k(x, x).sum() / m**2 + _k(y, y).sum() / n**2 - 2 * _k(x, y).sum() / (m * n)
    got = mmd2(_t(x), _t(y), "biased", bandwidths=GAMMAS)
    assert got.item() == pytest.approx(ref, rel=1e-10, abs=1e-12)


def test_mmd2_unbiased_matches_sklearn_rbf(xy):
    x, y = xy
    m, n = len(x), len(y)
    kxx, kyy = _k(x, x), _k(y, y)
    # Gretton et al., JMLR 2012, §2.2: MMD²_u drops the i = j terms and divides by m(m−1), n(n−1)
    ref = ((kxx.sum() - np.trace(kxx)) / (m * (m - 1)) + (kyy.sum() - np.trace(kyy)) / (n * (n - 1))
           - 2 * _k(x, y).sum() / (m * n))
    got = mmd2(_t(x), _t(y), "unbiased", bandwidths=GAMMAS)
    assert got.item() == pytest.approx(ref, rel=1e-10, abs=1e-12)


def test_mmd2_linear_matches_numpy_loop(xy):
    x, y = xy  # 7 and 5 points: ⌊5/2⌋ = 2 disjoint pairs from each domain

    def k(a, b):
        return np.mean([math.exp(-np.sum((a - b) ** 2) / g) for g in GAMMAS])

    # Gretton et al., JMLR 2012, §6: MMD²_l = mean over i of k(x₂ᵢ₋₁,x₂ᵢ) + k(y₂ᵢ₋₁,y₂ᵢ) − k(x₂ᵢ₋₁,y₂ᵢ) − k(x₂ᵢ,y₂ᵢ₋₁)
    h = [k(x[2 * i], x[2 * i + 1]) + k(y[2 * i], y[2 * i + 1]) - k(x[2 * i], y[2 * i + 1]) - k(x[2 * i + 1], y[2 * i])
         for i in range(len(y) // 2)]
    got = mmd2(_t(x), _t(y), "linear", bandwidths=GAMMAS)
    assert got.item() == pytest.approx(np.mean(h), rel=1e-10, abs=1e-12)


def test_mmd2_unbiased_has_mean_zero_under_the_null():
    # Two samples of one distribution: E[MMD²_u] = 0 exactly (a U-statistic; Gretton et al. 2012, §2.2), while the
    # biased V-statistic is positive in expectation. Fixed bandwidths, so the kernel does not depend on the sample.
    # Tolerance: 4 standard errors of the mean over R draws (the std measured from the draws themselves); with a
    # fixed seed the test is deterministic, and a correct estimator would fail it with probability ~1e-4 anyway.
    g = torch.Generator().manual_seed(0)
    R, m = 1500, 8
    u, b = [], []
    for _ in range(R):
        x, y = torch.randn(m, 2, generator=g, dtype=torch.float64), torch.randn(m, 2, generator=g, dtype=torch.float64)
        u.append(mmd2(x, y, "unbiased", bandwidths=[1.0, 4.0]).item())
        b.append(mmd2(x, y, "biased", bandwidths=[1.0, 4.0]).item())
    u, b = np.array(u), np.array(b)
    se = u.std(ddof=1) / math.sqrt(R)
    assert abs(u.mean()) < 4 * se
    assert b.mean() > 10 * b.std(ddof=1) / math.sqrt(R)  # the biased one is clearly off: the test has power


def test_mmd2_median_heuristic_uses_scipy_median_and_no_gradient(xy):
    x, y = xy
    x, y = x[:4], y[:2]  # 6 pooled points → 15 distinct pairs: an odd count, so every median convention agrees
    g0 = np.median(pdist(np.vstack([x, y]), "sqeuclidean"))  # scipy, independent of our distance code
    fixed = [g0 * 2.0**k for k in (-2, -1, 0, 1, 2)]
    xs1, xs2 = _t(x).requires_grad_(), _t(x).requires_grad_()
    auto = mmd2(xs1, _t(y), "biased")  # defaults: 5 kernels, factor 2
    ref = mmd2(xs2, _t(y), "biased", bandwidths=fixed)
    assert auto.item() == pytest.approx(ref.item(), rel=1e-10)
    auto.backward()
    ref.backward()
    # the median is computed on detached distances: the gradient is that of fixed bandwidths
    torch.testing.assert_close(xs1.grad, xs2.grad)


def test_mmd2_integer_weights_equal_repeated_rows(xy):
    x, y = xy
    w = np.array([1, 3, 1, 2, 1, 1, 2])
    xr = np.repeat(x, w, axis=0)  # weight 3 = the row three times
    # biased MMD² of the repeated sample, straight from sklearn (Gretton et al. 2012, §2.2)
    ref = _k(xr, xr).mean() + _k(y, y).mean() - 2 * _k(xr, y).mean()
    got = mmd2(_t(x), _t(y), "biased", bandwidths=GAMMAS, w_src=_t(w))
    assert got.item() == pytest.approx(ref, rel=1e-10)
    for est in ("unbiased", "linear"):  # uniform weights change nothing
        a = mmd2(_t(x), _t(y), est, bandwidths=GAMMAS, w_src=torch.ones(7, dtype=torch.float64))
        assert a.item() == pytest.approx(mmd2(_t(x), _t(y), est, bandwidths=GAMMAS).item(), rel=1e-10)


def test_mmd2_gradient_is_finite_with_duplicate_points():
    x = torch.tensor([[1.0, 2.0], [1.0, 2.0], [0.0, 0.0]], requires_grad=True)
    mmd2(x, torch.zeros(3, 2)).backward()  # zero distances on and off the diagonal
    assert torch.isfinite(x.grad).all()


def test_mmd2_bad_inputs():
    x = torch.randn(4, 3)
    with pytest.raises(ValueError, match=re.escape(
            "The 'estimator' parameter of mmd2 must be one of {'biased', 'unbiased', 'linear'}. Got 'fast' instead.")):
        mmd2(x, x, "fast")
    with pytest.raises(ValueError, match=re.escape("needs at least 2 samples per domain; got 1 source and 4 target")):
        mmd2(x[:1], x, "unbiased")
    with pytest.raises(ValueError, match=re.escape("needs at least 2 samples per domain; got 4 source and 1 target")):
        mmd2(x, x[:1], "linear")
    mmd2(x[:1], x[:1], "biased")  # the V-statistic is defined for one point per domain
    with pytest.raises(ValueError, match=re.escape("same feature width in both domains; got source 3 and target 2")):
        mmd2(x, torch.randn(4, 2))
    with pytest.raises(ValueError, match=re.escape("positive bandwidths; got [1.0, 0.0]")):
        mmd2(x, x, bandwidths=[1.0, 0.0])
    with pytest.raises(ValueError, match=re.escape("one source weight per source sample, shape (4,); got (3,)")):
        mmd2(x, x, w_src=torch.ones(3))


# -- CORAL -----------------------------------------------------------------------------------------------------
def test_coral_matches_numpy_cov_and_paper_formula(xy):
    x, y = xy
    d = x.shape[1]
    ref = np.sum((np.cov(x, rowvar=False) - np.cov(y, rowvar=False)) ** 2) / (4 * d * d)  # numpy.cov, Eq. 1
    one = np.ones((1, len(x)))  # Sun & Saenko 2016, Eq. 2 written out: C = (DᵀD − (1ᵀD)ᵀ(1ᵀD)/n)/(n−1)
    cs = (x.T @ x - (one @ x).T @ (one @ x) / len(x)) / (len(x) - 1)
    assert np.allclose(cs, np.cov(x, rowvar=False))
    got = coral_distance(_t(x), _t(y))
    assert got.item() == pytest.approx(ref, rel=1e-10)


def test_coral_weighted_matches_numpy_cov_aweights(xy):
    x, y = xy
    w = np.array([0.5, 2.0, 1.0, 1.5, 0.2, 1.0, 3.0])
    d = x.shape[1]
    ref = np.sum((np.cov(x, rowvar=False, aweights=w) - np.cov(y, rowvar=False)) ** 2) / (4 * d * d)
    got = coral_distance(_t(x), _t(y), w_src=_t(w))
    assert got.item() == pytest.approx(ref, rel=1e-10)


def test_coral_needs_two_samples_per_domain():
    with pytest.raises(ValueError, match=re.escape(
            "coral_distance needs at least 2 samples per domain; got 1 source and 3 target. Use a batch size of at "
            "least 2.")):
        coral_distance(torch.randn(1, 2), torch.randn(3, 2))
    with pytest.raises(ValueError, match=re.escape("(n_samples, n_features) for both domains; got source (3,)")):
        coral_distance(torch.randn(3), torch.randn(3, 2))


# -- gradient reversal ----------------------------------------------------------------------------------------
def test_grad_reverse_forward_identity_backward_negated():
    x = torch.randn(4, 3, dtype=torch.float64, requires_grad=True)
    y = grad_reverse(x, 0.3)
    torch.testing.assert_close(y, x, rtol=0, atol=0)  # R(x) = x (Ganin et al., JMLR 2016, Eq. 16)
    up = torch.randn(4, 3, dtype=torch.float64)
    (g,) = torch.autograd.grad(y, x, grad_outputs=up)
    torch.testing.assert_close(g, -0.3 * up)  # dR/dx = −λ·I (Eq. 17)


def test_grad_reverse_gradcheck():
    # gradcheck compares the backward with finite differences of the forward. The reversal layer's backward is
    # deliberately *not* its forward's derivative, except at λ = −1 (identity forward, identity backward): there
    # gradcheck must pass in float64, and at λ = 1 it must see the reversal as a mismatch.
    x = torch.randn(3, 2, dtype=torch.float64, requires_grad=True)
    assert torch.autograd.gradcheck(lambda v: torch.tanh(grad_reverse(v, -1.0)) * v, (x,))
    assert torch.autograd.gradgradcheck(lambda v: torch.tanh(grad_reverse(v, -1.0)) * v, (x,))
    assert not torch.autograd.gradcheck(lambda v: torch.tanh(grad_reverse(v, 1.0)), (x,), raise_exception=False)


# -- domain classification and confusion ----------------------------------------------------------------------
def test_confusion_loss_is_cross_entropy_with_uniform():
    logits = np.array([[2.0, -1.0], [0.3, 0.1], [-4.0, 1.0]])
    q = softmax(logits, axis=1)  # scipy
    ref = np.mean(-np.sum(0.5 * np.log(q), axis=1))  # L_conf = −Σ_d (1/D) log q_d (Tzeng et al., ICCV 2015)
    assert confusion_loss(_t(logits)).item() == pytest.approx(ref, rel=1e-12)
    # torch's own soft-target cross-entropy with the uniform distribution
    soft = F.cross_entropy(_t(logits), torch.full((3, 2), 0.5, dtype=torch.float64))
    assert confusion_loss(_t(logits)).item() == pytest.approx(soft.item(), rel=1e-12)


def test_confusion_loss_minimum_is_log2_at_a_5050_discriminator():
    assert confusion_loss(torch.zeros(6, 2)).item() == pytest.approx(math.log(2), rel=1e-6)
    g = torch.Generator().manual_seed(1)
    others = torch.randn(200, 1, 2, generator=g) * 3  # 200 random non-uniform discriminators, one sample each
    vals = torch.stack([confusion_loss(o) for o in others])
    assert (vals > math.log(2)).all()


def test_domain_bce_and_cross_entropy_match_sklearn_log_loss():
    s, t = np.array([1.5, -0.2, 0.7]), np.array([-1.0, 0.4, -2.0])  # equal sizes: pooled mean = domain average
    p = expit(np.concatenate([s, t]))
    ref = log_loss([1, 1, 1, 0, 0, 0], p)  # sklearn; source labelled 1
    assert domain_bce(_t(s), _t(t)).item() == pytest.approx(ref, rel=1e-10)
    assert inverted_label_loss(_t(t)).item() == pytest.approx(-np.mean(np.log(expit(t))), rel=1e-10)
    ls, lt = np.array([[2.0, 0.0], [0.5, 1.0]]), np.array([[0.0, 1.0], [3.0, -1.0]])
    ref2 = log_loss([0, 0, 1, 1], softmax(np.vstack([ls, lt]), axis=1), labels=[0, 1])  # source = class 0
    assert domain_cross_entropy(_t(ls), _t(lt)).item() == pytest.approx(ref2, rel=1e-10)


def test_domain_bce_target_weights_match_sklearn_log_loss_with_sample_weight():
    s, t = np.array([1.5, -0.2, 0.7]), np.array([-1.0, 0.4, -2.0, 0.3])
    ws, wt = np.array([0.5, 2.0, 1.0]), np.array([1.0, 3.0, 0.2, 0.7])
    # each domain's weighted mean (sklearn's log_loss with sample_weight normalises by the weights' sum), averaged
    ref = 0.5 * (log_loss([1, 1, 1], expit(s), sample_weight=ws, labels=[0, 1])
                 + log_loss([0, 0, 0, 0], expit(t), sample_weight=wt, labels=[0, 1]))
    assert domain_bce(_t(s), _t(t), _t(ws), _t(wt)).item() == pytest.approx(ref, rel=1e-10)


# -- CDAN: multilinear maps and entropy weights -----------------------------------------------------------------
def test_multilinear_map_matches_einsum_and_numpy_outer():
    rng = np.random.default_rng(3)
    f, g = rng.normal(size=(5, 4)), softmax(rng.normal(size=(5, 3)), axis=1)
    got = multilinear_map(_t(f), _t(g))
    assert got.shape == (5, 12)
    # torch.einsum's outer product per sample, flattened row-major (feature index major, class index minor)
    torch.testing.assert_close(got, torch.einsum("bi,bk->bik", _t(f), _t(g)).reshape(5, 12), rtol=0, atol=1e-15)
    for b in range(5):  # numpy.outer of one sample's f and g (Long et al., NeurIPS 2018, §3: T(h) = f ⊗ g)
        np.testing.assert_allclose(got[b].numpy(), np.outer(f[b], g[b]).ravel(), rtol=1e-14)
    with pytest.raises(ValueError, match=re.escape("multilinear_map needs features (B, F) and predictions (B, K) "
                                                   "with the same B; got (5, 4) and (4, 3).")):
        multilinear_map(_t(f), _t(g[:4]))


def test_randomized_map_matches_its_formula_in_numpy():
    rng = np.random.default_rng(4)
    f, g = rng.normal(size=(3, 6)), softmax(rng.normal(size=(3, 4)), axis=1)
    r_f, r_g = rng.normal(size=(10, 6)), rng.normal(size=(10, 4))
    ref = (f @ r_f.T) * (g @ r_g.T) / np.sqrt(10)  # (R_f f) ⊙ (R_g g) / √d, Long et al., NeurIPS 2018, §3
    np.testing.assert_allclose(randomized_multilinear_map(_t(f), _t(g), _t(r_f), _t(r_g)).numpy(), ref, rtol=1e-12)
    with pytest.raises(ValueError, match=re.escape("randomized_multilinear_map needs R_f (d, 6) and R_g (d, 4)")):
        randomized_multilinear_map(_t(f), _t(g), _t(r_f), _t(r_g[:, :3]))


def test_randomized_map_is_unbiased_for_the_exact_inner_products():
    # The paper's unbiasedness property (Long et al., NeurIPS 2018, §3): E_R ⟨T_⊙(h), T_⊙(h')⟩ = ⟨T_⊗(h), T_⊗(h')⟩
    # for R with independent zero-mean unit-variance entries. Checked on every pair of 4 points: the average over
    # 400 independent draws of (R_f, R_g) with d = 256 lies within 4 standard errors (estimated from the draws
    # themselves) of the exact value, which numpy.outer gives. A map with a wrong scale (√d missing, d instead of
    # √d) misses by a factor of 16 or more.
    rng = np.random.default_rng(5)
    f, g = rng.normal(size=(4, 5)), softmax(2 * rng.normal(size=(4, 3)), axis=1)
    exact = np.array([[np.outer(f[a], g[a]).ravel() @ np.outer(f[b], g[b]).ravel() for b in range(4)]
                      for a in range(4)])
    gen = torch.Generator().manual_seed(0)
    draws = []
    for _ in range(400):
        r_f = torch.randn(256, 5, generator=gen, dtype=torch.float64)
        r_g = torch.randn(256, 3, generator=gen, dtype=torch.float64)
        t = randomized_multilinear_map(_t(f), _t(g), r_f, r_g)  # (4, 256)
        draws.append((t @ t.T).numpy())
    draws = np.stack(draws)  # (400, 4, 4)
    mean, se = draws.mean(0), draws.std(0, ddof=1) / np.sqrt(len(draws))
    assert np.all(np.abs(mean - exact) <= 4 * se), (mean, exact, se)
    assert np.all(se < 0.2 * np.abs(exact).max())  # the check has power: the standard errors are small


def test_prediction_entropy_and_entropy_weights_match_scipy():
    logits = np.array([[2.0, 0.0, -1.0], [0.0, 0.0, 0.0], [30.0, 0.0, 0.0], [0.3, -0.2, 1.1]])
    p = softmax(logits, axis=1)
    h = scipy_entropy(p, axis=1)  # scipy.stats.entropy: −Σ p log p, natural log
    np.testing.assert_allclose(prediction_entropy(_t(logits)).numpy(), h, rtol=1e-12, atol=1e-12)
    w = 1 + np.exp(-h)  # CDAN+E's weight w(H(g)) = 1 + e^(−H(g)) (Long et al., NeurIPS 2018, §3)
    np.testing.assert_allclose(entropy_weights(_t(logits), normalise=False).numpy(), w, rtol=1e-12)
    np.testing.assert_allclose(entropy_weights(_t(logits)).numpy(), w / w.sum(), rtol=1e-12)  # normalised per domain
    assert entropy_weights(_t(logits)).sum().item() == pytest.approx(1.0, abs=1e-12)


# -- target-prediction terms ----------------------------------------------------------------------------------
TARGET_LOGITS = np.array([[2.0, 0.0, -1.0], [0.0, 0.0, 0.0], [30.0, 0.0, 0.0], [0.3, -0.2, 1.1], [-1.0, 2.5, 0.0]])


def test_mean_entropy_and_info_max_match_scipy_entropy():
    p = softmax(TARGET_LOGITS, axis=1)
    h = scipy_entropy(p, axis=1)  # scipy.stats.entropy, nats
    # Grandvalet & Bengio, NeurIPS 2004: H_emp = mean conditional entropy of the predictions
    assert mean_entropy(_t(TARGET_LOGITS)).item() == pytest.approx(h.mean(), rel=1e-12)
    # information maximisation (Liang, Hu & Feng, ICML 2020): minimise E H(p) − H(E p)
    assert info_max_loss(_t(TARGET_LOGITS)).item() == pytest.approx(h.mean() - scipy_entropy(p.mean(0)), rel=1e-12)
    # the selection score is the same quantity with the opposite sign
    from adaptkit.select.scores import info_max
    assert info_max_loss(_t(TARGET_LOGITS)).item() == pytest.approx(-info_max(p), rel=1e-10)


def test_info_max_loss_prefers_balanced_confidence_and_entropy_prefers_any_confidence():
    collapsed = _t([[30.0, 0.0], [30.0, 0.0]])  # confident, one class
    balanced = _t([[30.0, 0.0], [0.0, 30.0]])  # confident, both classes
    assert mean_entropy(collapsed).item() == pytest.approx(mean_entropy(balanced).item(), abs=1e-9)
    assert info_max_loss(balanced).item() == pytest.approx(-math.log(2), abs=1e-9)  # its minimum, −log K
    assert info_max_loss(collapsed).item() == pytest.approx(0.0, abs=1e-9)


@pytest.mark.parametrize("term", [mean_entropy, info_max_loss], ids=["entropy", "info_max"])
def test_one_gradient_step_on_a_target_term_lowers_it_and_the_entropy(term):
    # Direction: one SGD step on the term over a linear classifier lowers the term, and the target entropy
    # (scipy.stats.entropy of the predictions) goes down with it — a flipped sign would raise both.
    g = torch.Generator().manual_seed(0)
    x = torch.randn(64, 2, generator=g, dtype=torch.float64) + torch.tensor([[1.5, 0.0]], dtype=torch.float64) \
        * (torch.rand(64, 1, generator=g, dtype=torch.float64) > 0.5) * 2 - 1.5
    lin = torch.nn.Linear(2, 2).double()
    torch.manual_seed(0)
    with torch.no_grad():
        lin.weight.copy_(0.3 * torch.randn(2, 2, dtype=torch.float64))
    before_term = term(lin(x)).item()
    before_h = scipy_entropy(softmax(lin(x).detach().numpy(), axis=1), axis=1).mean()
    opt = torch.optim.SGD(lin.parameters(), lr=0.1)
    opt.zero_grad()
    term(lin(x)).backward()
    opt.step()
    assert term(lin(x)).item() < before_term
    assert scipy_entropy(softmax(lin(x).detach().numpy(), axis=1), axis=1).mean() < before_h


# -- prediction divergences -----------------------------------------------------------------------------------
def test_symmetric_kl_matches_scipy_rel_entr():
    a = np.array([[1.0, 0.0, -1.0], [0.2, 2.0, 0.5]])
    b = np.array([[0.0, 0.5, 0.5], [-1.0, 1.0, 3.0]])
    p, q = softmax(a, axis=1), softmax(b, axis=1)
    # ½[KL(p‖q) + KL(q‖p)] per sample, averaged (Saito et al., ICLR 2018); scipy's rel_entr = p·log(p/q)
    ref = np.mean(0.5 * (rel_entr(p, q).sum(1) + rel_entr(q, p).sum(1)))
    assert symmetric_kl(_t(a), _t(b)).item() == pytest.approx(ref, rel=1e-10)
    assert l1_discrepancy(_t(a), _t(b)).item() == pytest.approx(np.abs(p - q).mean(), rel=1e-10)  # MCD
    assert get_divergence("symmetric_kl") is symmetric_kl and set(DIVERGENCES) == {"symmetric_kl", "l1"}


def test_unknown_divergence():
    with pytest.raises(ValueError, match=re.escape(
            "The 'divergence' parameter of get_divergence must be one of {'symmetric_kl', 'l1'}. Got 'js' instead.")):
        get_divergence("js")


# -- DANN's ramp ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("p", [0.0, 0.5, 1.0])
def test_dann_ramp_values(p):
    # λ_p = 2/(1 + exp(−10p)) − 1 (Ganin et al., JMLR 2016, §5.2.2)
    assert dann_ramp(p) == pytest.approx(2 / (1 + math.exp(-10 * p)) - 1, rel=1e-12)
    assert dann_ramp(p) == pytest.approx({0.0: 0.0, 0.5: 0.9866142981514305, 1.0: 0.9999092042625951}[p], abs=1e-15)


# -- class weights: the label-shift correction ------------------------------------------------------------------
def _label_shifted(n=1500, seed=0):
    """Two Gaussian classes; source priors (0.9, 0.1), target priors (0.5, 0.5), the same class-conditional
    distributions (pure label shift). Returns source, its labels, target, the true ratios p_t(y)/p_s(y), and a
    source resampled to the target's priors."""
    rng = np.random.default_rng(seed)
    means = np.array([[0.0, 0.0], [2.5, 1.0]])

    def draw(priors, m):
        y = rng.choice(2, size=m, p=priors)
        return means[y] + rng.normal(size=(m, 2)), y

    xs, ys = draw([0.9, 0.1], n)  # (a mirrored mix such as 0.8/0.2 vs 0.2/0.8 has the same covariance: CORAL is blind)
    xt, _ = draw([0.5, 0.5], n)
    ratios = np.array([0.5 / 0.9, 0.5 / 0.1])
    pick = np.r_[rng.choice(np.flatnonzero(ys == 0), n // 2), rng.choice(np.flatnonzero(ys == 1), n // 2)]
    return xs, ys, xt, ratios, xs[pick]


def test_class_weighted_mmd_and_coral_equal_the_losses_of_a_resampled_source():
    """Importance weighting by the class ratio makes the source a sample of the target's class mix (Combes, Zhao,
    Wang & Gordon, NeurIPS 2020; Lipton et al. 2018 for the ratios): the weighted losses against the target equal,
    within sampling error, the unweighted losses of a source resampled to the target's priors, and both are far
    below the unweighted losses of the label-shifted source."""
    xs, ys, xt, ratios, resampled = _label_shifted()
    w = _t(ratios[ys])
    for loss in (lambda a, b, w=None: mmd2(a, b, "biased", bandwidths=GAMMAS, w_src=w),
                 lambda a, b, w=None: coral_distance(a, b, w_src=w)):
        weighted = loss(_t(xs), _t(xt), w).item()
        resampled_loss = loss(_t(resampled), _t(xt)).item()
        unweighted = loss(_t(xs), _t(xt)).item()
        assert unweighted > 10 * max(weighted, resampled_loss)  # the shift is there, and weighting removes it
        assert abs(weighted - resampled_loss) < 0.2 * unweighted  # the two corrections agree within sampling error
