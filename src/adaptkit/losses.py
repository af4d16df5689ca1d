"""Pure loss functions. Each takes tensors (features, logits, weights) — never loaders — and cites its source."""
from __future__ import annotations

import math
from typing import Callable, Dict, Optional, Sequence

import torch
import torch.nn.functional as F

from .train.precision import float32_loss


def weighted_cross_entropy(logits: torch.Tensor, y: torch.Tensor, w: Optional[torch.Tensor] = None) -> torch.Tensor:
    """Mean cross-entropy, optionally weighted per sample: Σ w_i·CE_i / Σ w_i. Labels of −1 are ignored.

    Shape: logits ``(B, K)``, y ``(B,)``, w ``(B,)`` or None → scalar.
    """
    if w is None:
        return F.cross_entropy(logits, y, ignore_index=-1)
    ce = F.cross_entropy(logits, y, ignore_index=-1, reduction="none")  # (B,)
    w = w * (y != -1)
    return (w * ce).sum() / w.sum().clamp_min(1e-12)


# ----------------------------------------------------------------------------------------------------------------
# Alignment losses. Pure functions of tensors; each cites the paper and equation it implements.
# ----------------------------------------------------------------------------------------------------------------
def _check_features(fs: torch.Tensor, ft: torch.Tensor, owner: str, min_n: int) -> None:
    if fs.ndim != 2 or ft.ndim != 2:
        raise ValueError(f"{owner} needs features shaped (n_samples, n_features) for both domains; got source "
                         f"{tuple(fs.shape)} and target {tuple(ft.shape)}.")
    if fs.shape[1] != ft.shape[1]:
        raise ValueError(f"{owner} needs the same feature width in both domains; got source {fs.shape[1]} and "
                         f"target {ft.shape[1]}.")
    if fs.shape[0] < min_n or ft.shape[0] < min_n:
        raise ValueError(f"{owner} needs at least {min_n} samples per domain; got {fs.shape[0]} source and "
                         f"{ft.shape[0]} target. Use a batch size of at least {min_n}.")


def _check_weights(w: Optional[torch.Tensor], n: int, owner: str) -> None:
    if w is not None and (w.ndim != 1 or w.shape[0] != n):
        raise ValueError(f"{owner} needs one source weight per source sample, shape ({n},); got {tuple(w.shape)}.")


# -- gradient reversal ------------------------------------------------------------------------------------------
class GradReverse(torch.autograd.Function):
    """The gradient reversal layer R_λ: identity forward, −λ·(upstream gradient) backward.

    Ganin et al., JMLR 17(59) 2016, Eqs. 16–17: R(x) = x and dR/dx = −λ·I. Placed between the feature extractor
    and the domain classifier, it lets one SGD step *minimise* the domain loss in the classifier and *maximise*
    it in the feature extractor. λ is a constant of the forward call; it receives no gradient.
    """

    @staticmethod
    def forward(ctx, x: torch.Tensor, lambda_: float) -> torch.Tensor:
        ctx.lambda_ = float(lambda_)
        return x.view_as(x)  # a view, so autograd records this node and not a no-op

    @staticmethod
    def backward(ctx, grad_out: torch.Tensor):
        return -ctx.lambda_ * grad_out, None


def grad_reverse(x: torch.Tensor, lambda_: float = 1.0) -> torch.Tensor:
    """Identity in the forward pass; multiplies the gradient by −``lambda_`` in the backward pass.

    Ganin et al., JMLR 2016, Eqs. 16–17 (the gradient reversal layer).

    Shape: any → same shape.

    Example:
        >>> x = torch.ones(3, requires_grad=True)
        >>> grad_reverse(x, 0.5).sum().backward()
        >>> x.grad
        tensor([-0.5000, -0.5000, -0.5000])
    """
    return GradReverse.apply(x, lambda_)


# -- CORAL ------------------------------------------------------------------------------------------------------
def _covariance(d: torch.Tensor, w: Optional[torch.Tensor] = None) -> torch.Tensor:
    """Sample covariance. Unweighted: C = (1/(n−1))(DᵀD − (1/n)(1ᵀD)ᵀ(1ᵀD)) (Sun & Saenko 2016, Eq. 2).
    Weighted (reliability weights, as ``numpy.cov(aweights=w)``): Σ wᵢ(xᵢ−μ_w)(xᵢ−μ_w)ᵀ / (V₁ − V₂/V₁),
    V₁ = Σwᵢ, V₂ = Σwᵢ²; equal to the unweighted form when all wᵢ are equal."""
    n = d.shape[0]
    if w is None:
        s = d.sum(0, keepdim=True)  # (1, d) = 1ᵀD
        return (d.T @ d - s.T @ s / n) / (n - 1)  # (d, d)
    v1 = w.sum()
    mu = (w[:, None] * d).sum(0, keepdim=True) / v1  # (1, d)
    c = d - mu  # (n, d)
    return (c.T * w) @ c / (v1 - (w * w).sum() / v1)  # (d, d)


@float32_loss  # covariances: differences of large sums, too coarse in bf16 (train/precision.py)
def coral_distance(fs: torch.Tensor, ft: torch.Tensor, w_src: Optional[torch.Tensor] = None) -> torch.Tensor:
    """Deep CORAL loss: ℓ = ‖C_S − C_T‖²_F / (4d²), the squared Frobenius distance between the domains' feature
    covariances, C = (1/(n−1))(DᵀD − (1/n)(1ᵀD)ᵀ(1ᵀD)).

    Sun & Saenko, "Deep CORAL", ECCV Workshops 2016, Eqs. 1–2. With ``w_src`` the source covariance is the
    weighted sample covariance (``numpy.cov(..., aweights=w_src)``), for per-sample re-weighted sources.

    Raises ValueError when a domain has fewer than 2 samples (the covariance needs n − 1 > 0).

    Shape: fs ``(n_s, d)``, ft ``(n_t, d)``, w_src ``(n_s,)`` or None → scalar.

    Example:
        >>> fs = torch.tensor([[0., 0.], [2., 0.]]); ft = torch.tensor([[0., 0.], [0., 2.]])
        >>> coral_distance(fs, ft)   # C_S = diag(2, 0), C_T = diag(0, 2): (4 + 4) / (4·2²)
        tensor(0.5000)
    """
    _check_features(fs, ft, "coral_distance", min_n=2)
    _check_weights(w_src, fs.shape[0], "coral_distance")
    d = fs.shape[1]
    diff = _covariance(fs, w_src) - _covariance(ft)  # (d, d)
    return (diff * diff).sum() / (4 * d * d)


# -- MMD --------------------------------------------------------------------------------------------------------
MMD_ESTIMATORS = ("biased", "unbiased", "linear")


def _sq_dists(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """‖aᵢ − bⱼ‖² for all pairs, via ‖a‖² + ‖b‖² − 2a·b (clamped at 0 against round-off). ``(n, d), (m, d) → (n, m)``.
    Unlike ``cdist(...)**2`` this has a finite gradient at zero distance."""
    return ((a * a).sum(1)[:, None] + (b * b).sum(1)[None, :] - 2 * a @ b.T).clamp_min(0)


def mmd_bandwidths(sq_dists: torch.Tensor, n_kernels: int = 5, kernel_mul: float = 2.0) -> torch.Tensor:
    """The Gaussian kernel family γ_k = kernel_mul^k · γ₀, k = −⌊n/2⌋ … (centred on γ₀), γ₀ = the median of
    ``sq_dists`` (the median heuristic on squared distances; γ as in exp(−‖x−y‖²/γ), see :func:`mmd2`), computed on
    detached values so no gradient flows through the bandwidth.

    DAN (Long et al., ICML 2015, §3) uses 2^−8·γ₀ … 2^8·γ₀ in steps of 2^½ (33 kernels); the default here,
    five kernels a factor 2 apart, is our choice: cheaper, and wide enough for the small feature spaces of toys.
    ``torch.median`` returns the lower of the two middle values for an even count. A zero median (all points
    equal) is replaced by 1 so the kernels stay defined.

    Shape: sq_dists any → ``(n_kernels,)``.
    """
    g0 = sq_dists.detach().flatten().median()
    g0 = torch.where(g0 > 0, g0, torch.ones_like(g0))
    k = torch.arange(n_kernels, dtype=g0.dtype, device=g0.device) - (n_kernels // 2)
    return g0 * float(kernel_mul) ** k  # (n_kernels,)


def _kernel(sq: torch.Tensor, gammas: torch.Tensor) -> torch.Tensor:
    """Equal-weight mean of Gaussian kernels exp(−‖x−y‖²/γ_k). ``(...), (K,) → (...)``.

    A sum over the K bandwidths rather than one broadcast ``(..., K)`` tensor: the same numbers without a K-times
    larger intermediate (about 2× faster for large batches, see benchmarks/RESULTS.md)."""
    out = torch.exp(-sq / gammas[0])
    for g in gammas[1:]:
        out = out + torch.exp(-sq / g)
    return out / len(gammas)


def _wmean(values: torch.Tensor, w: Optional[torch.Tensor]) -> torch.Tensor:
    return values.mean() if w is None else (w * values).sum() / w.sum()


@float32_loss  # kernels of ‖a‖² + ‖b‖² − 2a·b: too coarse in bf16 (train/precision.py)
def mmd2(fs: torch.Tensor, ft: torch.Tensor, estimator: str = "unbiased", n_kernels: int = 5,
         kernel_mul: float = 2.0, bandwidths: Optional[Sequence[float]] = None,
         w_src: Optional[torch.Tensor] = None) -> torch.Tensor:
    """Squared maximum mean discrepancy with a multi-kernel Gaussian k = (1/K) Σ_k exp(−‖x−y‖²/γ_k).

    Bandwidth convention (adaptkit's one, shared with :func:`adaptkit.measure.mmd2_between`): a bandwidth is the γ
    of exp(−‖x−y‖²/γ), in units of *squared* distance, and the median heuristic sets γ₀ = the median squared
    pairwise distance. This is DAN's form (Long et al., ICML 2015, §3: k = exp(−‖x−y‖²/γ) around the median); the
    median applies to squared distances directly, with no square root or factor 2. In σ terms, γ = 2σ²: γ₀ is half
    the γ that "σ = median distance" would give (σ₀ = median distance / √2).

    Estimators (Gretton et al., "A kernel two-sample test", JMLR 13, 2012: §2.2 for the U-statistic MMD²_u and
    the V-statistic MMD²_b, §6 for the linear-time MMD²_l), with x = source (m points), y = target (n points):

    - ``biased`` (V-statistic): 1/m² Σ_{i,j} k(xᵢ,xⱼ) + 1/n² Σ_{i,j} k(yᵢ,yⱼ) − 2/(mn) Σ_{i,j} k(xᵢ,yⱼ); ≥ 0.
    - ``unbiased`` (U-statistic): as above with i ≠ j in the within-domain sums, divided by m(m−1) and n(n−1);
      its expectation is exactly MMD², so it can be negative on a finite sample.
    - ``linear``: mean over the ⌊min(m,n)/2⌋ disjoint pairs of
      h = k(x₂ᵢ₋₁,x₂ᵢ) + k(y₂ᵢ₋₁,y₂ᵢ) − k(x₂ᵢ₋₁,y₂ᵢ) − k(x₂ᵢ,y₂ᵢ₋₁); O(n) time, unbiased, higher variance. Extra
      points of the larger domain are left out. DAN (Long et al., ICML 2015, §3) trains with this estimator.

    Bandwidths: ``bandwidths`` fixes the γ_k; otherwise :func:`mmd_bandwidths` builds ``n_kernels`` of them,
    ``kernel_mul`` apart, around the median squared distance between all pooled points (``biased``/``unbiased``;
    self-pairs excluded) or between the pairs the estimator uses (``linear``, to stay linear-time).

    Kernel weights are equal. DAN learns convex kernel weights by a quadratic program that maximises test power;
    we do not implement it: it needs a QP solve per step and an estimate of the statistic's variance, which is
    noisy on small batches, and equal weights are the common simplification of DAN.

    With ``w_src`` the source mean embedding is weighted: the within-source terms weight pair (i, j) by wᵢwⱼ, the
    cross terms weight pair (i, j) by wᵢ, each sum normalised by its total weight (uniform w gives the formulas
    above).

    Raises ValueError for an unknown ``estimator`` or too few samples (1 per domain for ``biased``, 2 otherwise).

    Shape: fs ``(m, d)``, ft ``(n, d)``, w_src ``(m,)`` or None → scalar.

    Example:
        >>> fs = torch.tensor([[0.], [1.]]); ft = torch.tensor([[0.], [1.]])
        >>> mmd2(fs, ft, "biased", bandwidths=[1.0]).abs() < 1e-6    # identical samples
        tensor(True)
    """
    if estimator not in MMD_ESTIMATORS:
        choices = ", ".join(map(repr, MMD_ESTIMATORS))
        raise ValueError(f"The 'estimator' parameter of mmd2 must be one of {{{choices}}}. Got {estimator!r} instead.")
    _check_features(fs, ft, f"mmd2 (estimator {estimator!r})", min_n=1 if estimator == "biased" else 2)
    _check_weights(w_src, fs.shape[0], "mmd2")
    gammas = None
    if bandwidths is not None:
        gammas = torch.as_tensor(list(bandwidths), dtype=fs.dtype, device=fs.device)  # (K,)
        if gammas.ndim != 1 or gammas.numel() == 0 or not bool((gammas > 0).all()):
            raise ValueError(f"mmd2 needs a non-empty list of positive bandwidths; got {list(bandwidths)!r}.")

    if estimator == "linear":
        h = min(fs.shape[0], ft.shape[0]) // 2
        x1, x2 = fs[0:2 * h:2], fs[1:2 * h:2]  # (h, d) each
        y1, y2 = ft[0:2 * h:2], ft[1:2 * h:2]
        sq = torch.stack([((x1 - x2) ** 2).sum(1), ((y1 - y2) ** 2).sum(1),
                          ((x1 - y2) ** 2).sum(1), ((x2 - y1) ** 2).sum(1)])  # (4, h)
        if gammas is None:
            gammas = mmd_bandwidths(sq, n_kernels, kernel_mul)
        k = _kernel(sq, gammas)  # (4, h)
        if w_src is None:
            return (k[0] + k[1] - k[2] - k[3]).mean()
        w1, w2 = w_src[0:2 * h:2], w_src[1:2 * h:2]
        return _wmean(k[0], w1 * w2) + k[1].mean() - _wmean(k[2], w1) - _wmean(k[3], w2)

    m, n = fs.shape[0], ft.shape[0]
    sq = _sq_dists(torch.cat([fs, ft]), torch.cat([fs, ft]))  # (m+n, m+n)
    if gammas is None:
        off = ~torch.eye(m + n, dtype=torch.bool, device=sq.device)
        gammas = mmd_bandwidths(sq[off], n_kernels, kernel_mul)
    k = _kernel(sq, gammas)  # (m+n, m+n)
    kss, ktt, kst = k[:m, :m], k[m:, m:], k[:m, m:]
    ws = torch.ones(m, dtype=fs.dtype, device=fs.device) if w_src is None else w_src.to(fs.dtype)
    wss = ws[:, None] * ws[None, :]  # (m, m) pair weights
    wtt = torch.ones(n, n, dtype=fs.dtype, device=fs.device)
    if estimator == "unbiased":  # drop the i = j terms
        wss = wss * (1 - torch.eye(m, dtype=fs.dtype, device=fs.device))
        wtt = wtt * (1 - torch.eye(n, dtype=fs.dtype, device=fs.device))
    wst = ws[:, None].expand(m, n)
    return (wss * kss).sum() / wss.sum() + (wtt * ktt).sum() / wtt.sum() - 2 * (wst * kst).sum() / wst.sum()


# -- adversarial and confusion losses ---------------------------------------------------------------------------
def domain_bce(logits_src: torch.Tensor, logits_tgt: torch.Tensor,
               w_src: Optional[torch.Tensor] = None, w_tgt: Optional[torch.Tensor] = None) -> torch.Tensor:
    """Binary domain-classification loss with source = 1, target = 0, the two domains weighted equally:
    ½[−mean_i log σ(sᵢ) − mean_j log(1 − σ(tⱼ))].

    The domain classifier's logistic loss of DANN (Ganin et al., JMLR 2016, §4) and ADDA's discriminator loss
    L_advD (Tzeng, Hoffman, Saenko & Darrell, CVPR 2017, §3). Averaging per domain keeps
    the two domains equal when batch sizes differ; with equal sizes it is the pooled mean. ``w_src`` weights the
    source mean (Σ wᵢ·ℓᵢ / Σ wᵢ), ``w_tgt`` the target mean likewise (CDAN+E's entropy weights, normalised within
    each domain: see :func:`entropy_weights`).

    Shape: logits_src ``(n_s,)``, logits_tgt ``(n_t,)``, w_src ``(n_s,)`` or None, w_tgt ``(n_t,)`` or None → scalar.

    Example:
        >>> domain_bce(torch.zeros(4), torch.zeros(4))   # a discriminator that cannot tell: log 2
        tensor(0.6931)
    """
    ls = F.binary_cross_entropy_with_logits(logits_src, torch.ones_like(logits_src), reduction="none")
    lt = F.binary_cross_entropy_with_logits(logits_tgt, torch.zeros_like(logits_tgt), reduction="none")
    return 0.5 * (_wmean(ls, w_src) + _wmean(lt, w_tgt))


def inverted_label_loss(logits_tgt: torch.Tensor) -> torch.Tensor:
    """The GAN loss with inverted labels for the target encoder: −mean log σ(tⱼ), i.e. target features labelled
    "source": ADDA's mapping loss L_advM (Tzeng et al., CVPR 2017, §3), the non-saturating generator loss of
    Goodfellow et al., NIPS 2014.

    Shape: ``(n_t,)`` → scalar.

    Example:
        >>> inverted_label_loss(torch.zeros(3))   # log 2
        tensor(0.6931)
    """
    return F.softplus(-logits_tgt).mean()  # −log σ(t) = softplus(−t), stable for large |t|


def domain_cross_entropy(logits_src: torch.Tensor, logits_tgt: torch.Tensor,
                         w_src: Optional[torch.Tensor] = None) -> torch.Tensor:
    """Softmax domain-classification loss L_D = −Σ_d 1[y_D = d] log q_d with source = class 0, target = class 1,
    the two domains weighted equally: ½[mean_i CE(sᵢ, 0) + mean_j CE(tⱼ, 1)] (Tzeng et al., ICCV 2015, §3.1).

    Shape: logits_src ``(n_s, 2)``, logits_tgt ``(n_t, 2)``, w_src ``(n_s,)`` or None → scalar.

    Example:
        >>> domain_cross_entropy(torch.zeros(2, 2), torch.zeros(3, 2))   # log 2
        tensor(0.6931)
    """
    ls = F.cross_entropy(logits_src, torch.zeros(len(logits_src), dtype=torch.long, device=logits_src.device),
                         reduction="none")
    lt = F.cross_entropy(logits_tgt, torch.ones(len(logits_tgt), dtype=torch.long, device=logits_tgt.device),
                         reduction="none")
    return 0.5 * (_wmean(ls, w_src) + lt.mean())


def confusion_loss(domain_logits: torch.Tensor, w: Optional[torch.Tensor] = None) -> torch.Tensor:
    """Domain confusion: cross-entropy between the domain classifier's softmax q and the uniform distribution,
    L_conf = −Σ_d (1/D) log q_d, averaged over samples (optionally weighted Σ wᵢ·ℓᵢ / Σ wᵢ).

    Tzeng, Hoffman, Darrell & Saenko, "Simultaneous deep transfer across domains and tasks", ICCV 2015, §3.1
    (the confusion loss). Its minimum, log D, is reached exactly when q is uniform: the features carry no
    domain information the classifier can use.

    Shape: ``(B, D)`` → scalar.

    Example:
        >>> confusion_loss(torch.zeros(5, 2))   # a 50/50 classifier: log 2, the minimum
        tensor(0.6931)
    """
    per_sample = -F.log_softmax(domain_logits, dim=1).mean(1)  # (B,)
    return _wmean(per_sample, w)


# -- conditional adversarial alignment (CDAN) -------------------------------------------------------------------
def multilinear_map(f: torch.Tensor, g: torch.Tensor) -> torch.Tensor:
    """The multilinear map T_⊗(h) = f ⊗ g, the outer product of each sample's features f and class probabilities
    g, flattened: entry (i·K + k) of row b is f_bi·g_bk.

    Long, Cao, Wang & Jordan, "Conditional adversarial domain adaptation", NeurIPS 2018, §3 (the multilinear map
    T_⊗; section number from memory): the discriminator sees the features *conditioned* on the predictions, so
    it can tell apart multimodal structure that the features alone hide.

    Shape: f ``(B, F)``, g ``(B, K)`` → ``(B, F·K)``.

    Example:
        >>> multilinear_map(torch.tensor([[1., 2.]]), torch.tensor([[0.25, 0.75]]))
        tensor([[0.2500, 0.7500, 0.5000, 1.5000]])
    """
    if f.ndim != 2 or g.ndim != 2 or f.shape[0] != g.shape[0]:
        raise ValueError(f"multilinear_map needs features (B, F) and predictions (B, K) with the same B; got "
                         f"{tuple(f.shape)} and {tuple(g.shape)}.")
    return (f[:, :, None] * g[:, None, :]).flatten(1)  # (B, F, K) → (B, F·K)


def randomized_multilinear_map(f: torch.Tensor, g: torch.Tensor, r_f: torch.Tensor,
                               r_g: torch.Tensor) -> torch.Tensor:
    """The randomised multilinear map T_⊙(h) = (R_f f) ⊙ (R_g g) / √d, with fixed random matrices R_f ``(d, F)``
    and R_g ``(d, K)`` drawn once (entries of mean 0 and variance 1, e.g. standard normal).

    Long et al., NeurIPS 2018, §3 (the randomised map T_⊙; section number from memory): used when F·K is too large
    for the exact map (the paper: F·K > 4096, d = 1024). It is unbiased for the exact map's inner products,
    E_R[⟨T_⊙(h), T_⊙(h')⟩] = ⟨T_⊗(h), T_⊗(h')⟩ = ⟨f, f'⟩⟨g, g'⟩, since each of the d coordinates contributes
    (r_f·f)(r_f·f')(r_g·g)(r_g·g') / d, whose expectation is ⟨f, f'⟩⟨g, g'⟩ / d for independent zero-mean
    unit-variance entries.

    Shape: f ``(B, F)``, g ``(B, K)``, r_f ``(d, F)``, r_g ``(d, K)`` → ``(B, d)``.
    """
    if r_f.ndim != 2 or r_g.ndim != 2 or r_f.shape[0] != r_g.shape[0] or r_f.shape[1] != f.shape[-1] \
            or r_g.shape[1] != g.shape[-1]:
        raise ValueError(f"randomized_multilinear_map needs R_f (d, {f.shape[-1]}) and R_g (d, {g.shape[-1]}) with "
                         f"the same d; got {tuple(r_f.shape)} and {tuple(r_g.shape)}.")
    return (f @ r_f.T) * (g @ r_g.T) / math.sqrt(r_f.shape[0])  # (B, d)


def prediction_entropy(logits: torch.Tensor) -> torch.Tensor:
    """Shannon entropy (natural log) of each sample's class distribution softmax(logits):
    H(p) = −Σ_k p_k log p_k, computed from log-softmax so that p_k = 0 contributes 0.

    Shape: ``(B, K)`` → ``(B,)``.

    Example:
        >>> prediction_entropy(torch.zeros(1, 2))   # uniform over 2 classes: log 2
        tensor([0.6931])
    """
    logp = F.log_softmax(logits, dim=1)  # (B, K)
    return -(logp.exp() * logp).sum(1)


def entropy_weights(logits: torch.Tensor, normalise: bool = True) -> torch.Tensor:
    """CDAN+E's sample weights w(H(g)) = 1 + e^(−H(g)): confident predictions (low entropy) weigh more in the
    domain loss. With ``normalise`` they are divided by their sum, so a batch of one domain has total weight 1
    (the paper normalises the weights within each domain; pass each domain's logits separately).

    Long et al., NeurIPS 2018, §3 (entropy conditioning, CDAN+E; section from memory).

    Shape: ``(B, K)`` → ``(B,)``.

    Example:
        >>> entropy_weights(torch.tensor([[0., 0.], [50., 0.]]), normalise=False)   # 1 + 1/2, and 1 + e^0
        tensor([1.5000, 2.0000])
    """
    w = 1.0 + torch.exp(-prediction_entropy(logits))  # (B,)
    return w / w.sum() if normalise else w


# -- target-prediction terms (entropy minimisation, information maximisation) ----------------------------------
def mean_entropy(logits: torch.Tensor) -> torch.Tensor:
    """Mean prediction entropy (1/n) Σ_i H(p_i), p_i = softmax(logits_i), in nats: the term entropy minimisation
    adds, with a weight, to the loss on unlabelled (target) points (Grandvalet & Bengio, "Semi-supervised learning
    by entropy minimization", NeurIPS 2004: the criterion L − λ·H_emp, H_emp = −(1/n) Σ_i Σ_k p_ik log p_ik).
    Minimising it makes target predictions confident; on its own it also rewards collapsing onto one class.

    Shape: ``(B, K)`` → scalar.

    Example:
        >>> mean_entropy(torch.tensor([[0., 0.], [50., 0.]]))   # (log 2 + 0) / 2
        tensor(0.3466)
    """
    return prediction_entropy(logits).mean()


def info_max_loss(logits: torch.Tensor) -> torch.Tensor:
    """The information-maximisation term to *minimise*: E_i H(p_i) − H(E_i p_i), the negative of the mutual
    information H(p̄) − (1/n) Σ_i H(p_i) between inputs and predicted labels (p̄ = batch-mean prediction). Confident
    *and* diverse predictions minimise it (down to −log K), so unlike :func:`mean_entropy` it does not reward a
    collapse onto one class.

    As used for adaptation by Liang, Hu & Feng, "Do we really need to access the source data?", ICML 2020 (SHOT:
    L_ent + L_div; the information-maximisation objective of Krause, Perona & Gomes, NeurIPS 2010). The same
    quantity, with the opposite sign and on a whole target set, is the selection score
    :func:`adaptkit.select.scores.info_max`.

    Shape: ``(B, K)`` → scalar.

    Example:
        >>> info_max_loss(torch.tensor([[50., 0.], [0., 50.]]))   # confident and balanced: −log 2
        tensor(-0.6931)
    """
    p_bar = F.softmax(logits, dim=1).mean(0)  # (K,)
    h_bar = -(p_bar * torch.log(p_bar.clamp_min(1e-30))).sum()
    return mean_entropy(logits) - h_bar


# -- prediction divergences (ADR's sensitivity, MCD's discrepancy) ----------------------------------------------
def symmetric_kl(p_logits: torch.Tensor, q_logits: torch.Tensor) -> torch.Tensor:
    """Symmetric KL divergence ½[KL(p‖q) + KL(q‖p)] between the class distributions p = softmax(p_logits) and
    q = softmax(q_logits), per sample, averaged over the batch.

    ADR's sensitivity between two dropout samples of the classifier (Saito, Ushiku, Harada & Saenko,
    "Adversarial dropout regularization", ICLR 2018). Computed from log-softmax for stability.

    Shape: ``(B, K)``, ``(B, K)`` → scalar.

    Example:
        >>> symmetric_kl(torch.tensor([[0., 0.]]), torch.tensor([[0., 0.]]))
        tensor(0.)
    """
    lp, lq = F.log_softmax(p_logits, dim=1), F.log_softmax(q_logits, dim=1)  # (B, K)
    p, q = lp.exp(), lq.exp()
    kl_pq = (p * (lp - lq)).sum(1)  # (B,)
    kl_qp = (q * (lq - lp)).sum(1)
    return 0.5 * (kl_pq + kl_qp).mean()


def l1_discrepancy(p_logits: torch.Tensor, q_logits: torch.Tensor) -> torch.Tensor:
    """Mean absolute difference between the class probabilities, (1/K) Σ_k |p_k − q_k|, averaged over samples.

    MCD's classifier discrepancy (Saito, Watanabe, Ushiku & Harada, "Maximum classifier discrepancy", CVPR 2018),
    offered as ADR's alternative divergence.

    Shape: ``(B, K)``, ``(B, K)`` → scalar.

    Example:
        >>> l1_discrepancy(torch.tensor([[10., -10.]]), torch.tensor([[-10., 10.]]))   # (|1−0| + |0−1|)/2 ≈ 1
        tensor(1.)
    """
    return (F.softmax(p_logits, dim=1) - F.softmax(q_logits, dim=1)).abs().mean()


DIVERGENCES: Dict[str, Callable[[torch.Tensor, torch.Tensor], torch.Tensor]] = {
    "symmetric_kl": symmetric_kl,
    "l1": l1_discrepancy,
}


def get_divergence(name: str, owner: str = "get_divergence") -> Callable[[torch.Tensor, torch.Tensor], torch.Tensor]:
    """The prediction divergence called ``name`` (one of :data:`DIVERGENCES`); a ValueError lists the names."""
    if name not in DIVERGENCES:
        raise ValueError(f"The 'divergence' parameter of {owner} must be one of "
                         f"{{{', '.join(map(repr, DIVERGENCES))}}}. Got {name!r} instead.")
    return DIVERGENCES[name]


# ----------------------------------------------------------------------------------------------------------------
# Self-training: pseudo-labels from the model's own confident target predictions.
# ----------------------------------------------------------------------------------------------------------------
def select_pseudo_labels(probs: torch.Tensor, threshold: float, class_balanced: bool = False):
    """Pseudo-labels ``argmax_k p_ik`` and the rows kept: those whose confidence ``max_k p_ik`` is strictly above
    ``threshold`` (the confidence mask of FixMatch, Sohn et al., NeurIPS 2020, which uses ≥ τ; strict here so that
    τ = 1 keeps no row). With ``class_balanced``, every predicted class then keeps at most ``m`` rows, its most
    confident ones, ``m`` the smallest per-class count among the classes that kept any row — so the kept rows are
    balanced over the predicted classes, after the class-balanced selection of CBST (Zou, Yu, Kumar & Wang, ECCV
    2018, which picks per-class thresholds so each class gives the same *share* of its rows; the equal count per
    batch, and classes without a confident row not holding the others back, are ours). Ties in confidence keep
    the earlier row. No gradient: ``probs`` is detached here.

    Shape: probs ``(B, K)`` → (labels ``(B,)`` int64, keep ``(B,)`` bool).

    Example:
        >>> p = torch.tensor([[0.95, 0.05], [0.97, 0.03], [0.6, 0.4], [0.08, 0.92]])
        >>> select_pseudo_labels(p, 0.9)[1].tolist()
        [True, True, False, True]
        >>> select_pseudo_labels(p, 0.9, class_balanced=True)[1].tolist()   # one row per class: the most confident
        [False, True, False, True]
    """
    probs = probs.detach()
    conf, labels = probs.max(dim=1)  # (B,), (B,)
    keep = conf > threshold
    if class_balanced and bool(keep.any()):
        counts = torch.bincount(labels[keep], minlength=probs.shape[1])  # (K,)
        m = int(counts[counts > 0].min())
        balanced = torch.zeros_like(keep)
        for k in torch.nonzero(counts).flatten().tolist():
            rows = torch.nonzero(keep & (labels == k)).flatten()  # in batch order
            order = torch.sort(conf[rows], descending=True, stable=True).indices  # ties: the earlier row first
            balanced[rows[order[:m]]] = True
        keep = balanced
    return labels, keep


def pseudo_label_loss(logits: torch.Tensor, threshold: float, class_balanced: bool = False,
                      probs: Optional[torch.Tensor] = None):
    """Cross-entropy of ``logits`` against their own detached pseudo-labels (or those of ``probs``, another model's
    class probabilities on the same rows, e.g. a mean teacher's) on the rows kept by
    :func:`select_pseudo_labels` (Lee, "Pseudo-Label", ICML 2013 workshop: the class of maximum predicted
    probability used as if it were a true label), averaged over the kept rows (FixMatch, Sohn et al., NeurIPS 2020,
    divides by the whole batch instead [memory]; ours: the kept rows, so the term does not shrink with the share
    kept — the share is returned to log). A zero with no gradient when no row is kept.

    Shape: logits ``(B, K)``, probs ``(B, K)`` → (scalar loss, scalar share of rows kept in [0, 1]).

    Example:
        >>> loss, kept = pseudo_label_loss(torch.tensor([[4.0, 0.0], [0.1, 0.0]]), 0.9)
        >>> round(float(loss), 4), float(kept)   # row 0 only: −log softmax(4, 0)_0
        (0.0181, 0.5)
    """
    if probs is None:
        probs = torch.softmax(logits.detach(), dim=1)  # (B, K)
    labels, keep = select_pseudo_labels(probs, threshold, class_balanced)
    share = keep.float().mean()
    if not bool(keep.any()):
        return logits.new_zeros(()), share
    return F.cross_entropy(logits[keep], labels[keep]), share
