"""Target class proportions without target labels: black-box shift estimation, EM prior re-estimation, and a test
of "no label shift".

Under *label shift* the class proportions differ between domains while each class looks the same
(p_t(x | y) = p_s(x | y)). Marginal feature alignment (DANN, MMD, CORAL, …) then maps target points to the wrong
class, and it hides the shift: aligned predictions drift back to the source proportions. So the estimate is made
from a model trained on the source alone (adaptkit's guard and candidate runs use the source-only run; a plain run
uses a logistic regression on the inputs, see :mod:`adaptkit.trust.reference`).

Two estimators, both from a classifier's source-validation predictions (labelled) and target predictions:

* **BBSE** (Lipton, Wang & Smola, "Detecting and correcting for label shift with black box predictors", ICML
  2018): with the joint confusion matrix C[i, j] = P_s(ŷ = i, y = j) on held-out source data and the target's
  predicted-class frequencies μ[i] = P_t(ŷ = i), label shift gives μ = C w for the class ratios
  w[j] = π_t(j) / π_s(j), so ŵ = Ĉ⁻¹ μ̂ and π̂_t = ŵ ⊙ π̂_s. Consistent for any fixed classifier whose confusion
  matrix is invertible [memory].
* **EM** (Saerens, Latinne & Decaestecker, "Adjusting the outputs of a classifier to new a priori
  probabilities", Neural Computation 14, 2002): iterate p_t(y | x) ∝ (π_t(y) / π_s(y)) · p_s(y | x), then
  π_t(y) = mean_x p_t(y | x), to a fixed point. It needs calibrated probabilities; bias-corrected temperature
  scaling (Alexandari, Kundaje & Shrikumar, ICML 2020 [memory]) is applied first, fitted on source validation.

A bootstrap over source-validation and target rows gives an interval for every class proportion; "no label
shift" is judged from it (and from a χ² two-sample test of the predicted-class counts, which also reacts to
covariate shift, so it is reported but not decisive).
"""
from __future__ import annotations

import dataclasses
from typing import Any, Dict, List, Optional

import numpy as np

from .._checks import check_choice, check_number

__all__ = ["LabelShiftEstimate", "bbse", "em_priors", "calibrate", "estimate_label_shift", "class_ratios",
           "MIN_PER_CLASS", "MAX_CONDITION", "MAX_RATIO"]

MIN_PER_CLASS = 5  # ours: fewer labelled source-validation samples of a class cannot estimate its confusion column
MAX_CONDITION = 1e3  # ours: a confusion matrix this ill-conditioned amplifies sampling noise; EM is used instead
MAX_RATIO = 10.0  # ours: cap on an estimated ratio π_t/π_s, so a few points cannot dominate a weighted loss
MAX_DISAGREEMENT = 0.10  # ours: BBSE and EM further apart than this (total variation) make the estimate unreliable


def _probs(p: Any, name: str, owner: str) -> np.ndarray:
    a = np.asarray(p, dtype=np.float64)
    if a.ndim != 2 or a.shape[0] == 0 or not np.all(np.isfinite(a)) or (a < -1e-6).any() or \
            np.abs(a.sum(1) - 1).max() > 1e-3:
        raise ValueError(f"The {name!r} input of {owner} must be class probabilities of shape (n, K), rows "
                         f"summing to 1. Got an array of shape {a.shape}.")
    return np.clip(a, 0.0, 1.0)


def _labels(y: Any, k: int, owner: str) -> np.ndarray:
    a = np.asarray(y)
    if a.ndim != 1 or a.dtype.kind not in "iu" or (a.size and (a.min() < 0 or a.max() >= k)):
        raise ValueError(f"The 'source_labels' input of {owner} must be integer labels in [0, {k - 1}]. Got "
                         f"{a.dtype} values of shape {a.shape}.")
    return a.astype(np.int64)


def _check_classes(y: np.ndarray, k: int, owner: str, min_per_class: int) -> np.ndarray:
    counts = np.bincount(y, minlength=k)
    for c in range(k):
        if counts[c] == 0:
            raise ValueError(f"{owner}: class {c} is absent from the labelled source-validation samples; its "
                             "target proportion cannot be estimated. Every class must appear in the source.")
        if counts[c] < min_per_class:
            raise ValueError(f"{owner}: class {c} has {counts[c]} labelled source-validation sample(s); at least "
                             f"{min_per_class} per class are needed to estimate the confusion matrix.")
    return counts


def _simplex(w: np.ndarray, src: np.ndarray, max_ratio: float, notes: List[str]) -> np.ndarray:
    """Ratios → proportions: negative ratios set to 0, then the ratios scaled so that Σ π_s·w = 1 with no ratio
    above ``max_ratio`` (classes over the cap are held at it and the others rescaled, until none is over)."""
    w = np.asarray(w, dtype=np.float64).copy()
    if (w < 0).any():
        notes.append(f"negative ratio estimates for class(es) {np.flatnonzero(w < 0).tolist()} set to 0")
        w = np.maximum(w, 0.0)
    if (w * src).sum() <= 0:
        notes.append("every estimated ratio was 0; kept the source proportions")
        return src.copy()
    w /= (w * src).sum()
    capped = np.zeros(len(w), dtype=bool)
    for _ in range(len(w)):
        over = (w > max_ratio * (1 + 1e-12)) & ~capped
        if not over.any():
            break
        capped |= over
        w[capped] = max_ratio
        free = ~capped & (w > 0)
        rest = 1.0 - (w[capped] * src[capped]).sum()
        if not free.any() or rest <= 0:
            break
        w[free] *= rest / (w[free] * src[free]).sum()
    if capped.any():
        notes.append(f"ratios above {max_ratio:g} for class(es) {np.flatnonzero(capped).tolist()} capped at "
                     f"{max_ratio:g}")
    q = w * src
    return q / q.sum()


def bbse(source_probs: Any, source_labels: Any, target_probs: Any, *, soft: bool = False,
         max_ratio: float = MAX_RATIO, min_per_class: int = MIN_PER_CLASS) -> Dict[str, Any]:
    """Black-box shift estimation: ``{"ratios": ŵ = Ĉ⁻¹ μ̂, "proportions": π̂_t, "condition": cond(Ĉ), "notes"}``.

    ``soft=False`` (the paper's): Ĉ[i, j] = mean over source-validation rows of 1[ŷ = i, y = j] with ŷ the arg-max
    prediction, μ̂[i] = share of target rows predicted i. ``soft=True``: the same with probabilities in place of
    indicators. Raises ``ValueError`` for a class with fewer than ``min_per_class`` source-validation samples and
    for a singular Ĉ (callers fall back to EM).

    Shape: source_probs ``(n_s, K)``, source_labels ``(n_s,)``, target_probs ``(n_t, K)``.

    Example:
        >>> p = np.eye(2)[[0] * 5 + [1] * 5]          # a perfect classifier on 5 + 5 source rows
        >>> out = bbse(p, [0] * 5 + [1] * 5, np.eye(2)[[0] * 9 + [1]])
        >>> out["proportions"].round(2).tolist()
        [0.9, 0.1]
    """
    owner = "bbse"
    ps, pt = _probs(source_probs, "source_probs", owner), _probs(target_probs, "target_probs", owner)
    k = ps.shape[1]
    if pt.shape[1] != k:
        raise ValueError(f"{owner}: source and target probabilities must have the same {k} classes; got "
                         f"{pt.shape[1]} for the target.")
    y = _labels(source_labels, k, owner)
    if len(y) != len(ps):
        raise ValueError(f"{owner}: {len(y)} source labels for {len(ps)} rows of source probabilities.")
    counts = _check_classes(y, k, owner, min_per_class)
    src = counts / counts.sum()
    if soft:
        c = (ps.T @ np.eye(k)[y]) / len(y)  # (K, K): C[i, j] = mean p_i · 1[y = j]
        mu = pt.mean(0)
    else:
        c = np.zeros((k, k))
        np.add.at(c, (ps.argmax(1), y), 1.0 / len(y))
        mu = np.bincount(pt.argmax(1), minlength=k) / len(pt)
    cond = float(np.linalg.cond(c))
    if not np.isfinite(cond) or cond > 1e12:
        raise ValueError(f"{owner}: the source-validation confusion matrix is singular (condition number "
                         f"{cond:.3g}); a class is never predicted, so BBSE cannot separate it.")
    w = np.linalg.solve(c, mu)
    notes: List[str] = []
    return {"ratios": w, "proportions": _simplex(w, src, max_ratio, notes), "condition": cond, "notes": notes,
            "source_proportions": src}


def calibrate(source_probs: Any, source_labels: Any, *, bias: bool = True):
    """Bias-corrected temperature scaling fitted on source validation: a function ``probs → calibrated probs``
    that maps p to softmax(log p / T + b) with T > 0 and per-class biases b (``bias=False``: temperature only,
    Guo, Pleiss, Sun & Weinberger, ICML 2017), minimising the negative log-likelihood of the source labels
    (scipy.optimize). Biases sum to zero (a shared shift changes nothing).
    """
    from scipy.optimize import minimize
    from scipy.special import log_softmax

    ps = _probs(source_probs, "source_probs", "calibrate")
    k = ps.shape[1]
    y = _labels(source_labels, k, "calibrate")
    logits = np.log(np.maximum(ps, 1e-12))

    def unpack(theta):
        b = np.zeros(k)
        if bias:
            b[1:] = theta[1:]
            b -= b.mean()
        return np.exp(theta[0]), b

    def nll(theta):
        t, b = unpack(theta)
        return -log_softmax(logits / t + b, axis=1)[np.arange(len(y)), y].mean()

    theta0 = np.zeros(k if bias else 1)
    theta = minimize(nll, theta0, method="L-BFGS-B").x
    t, b = unpack(theta)

    def apply(p: Any) -> np.ndarray:
        from scipy.special import softmax

        return softmax(np.log(np.maximum(np.asarray(p, dtype=np.float64), 1e-12)) / t + b, axis=1)

    apply.temperature, apply.bias = float(t), b  # type: ignore[attr-defined]
    return apply


def em_priors(target_probs: Any, source_proportions: Any, *, max_iter: int = 1000, tol: float = 1e-8,
              max_ratio: float = MAX_RATIO) -> Dict[str, Any]:
    """EM re-estimation of the target class proportions (Saerens, Latinne & Decaestecker, 2002):
    π ← mean_x normalise((π / π_s) ⊙ p_s(· | x)), from π = π_s, until the largest change is below ``tol``.

    ``target_probs`` should be calibrated source-model probabilities (:func:`calibrate`).

    Shape: target_probs ``(n_t, K)``, source_proportions ``(K,)``.

    Example:
        >>> out = em_priors([[0.9, 0.1], [0.8, 0.2], [0.2, 0.8]], [0.5, 0.5])
        >>> bool(out["proportions"][0] > 0.6)
        True
    """
    owner = "em_priors"
    pt = _probs(target_probs, "target_probs", owner)
    src = np.asarray(source_proportions, dtype=np.float64)
    if src.shape != (pt.shape[1],) or (src <= 0).any() or abs(src.sum() - 1) > 1e-6:
        raise ValueError(f"The 'source_proportions' input of {owner} must be {pt.shape[1]} positive numbers summing "
                         f"to 1. Got {src.tolist()}.")
    check_number("max_iter", owner, max_iter, low=1, integer=True)
    pi = src.copy()
    iterations = 0
    for iterations in range(1, max_iter + 1):
        post = pt * (pi / src)  # (n, K)
        post /= np.maximum(post.sum(1, keepdims=True), 1e-300)
        new = post.mean(0)
        done = np.abs(new - pi).max() < tol
        pi = new
        if done:
            break
    notes: List[str] = [] if iterations < max_iter else [f"EM stopped after {max_iter} iterations unconverged"]
    return {"ratios": pi / src, "proportions": _simplex(pi / src, src, max_ratio, notes), "notes": notes,
            "iterations": iterations, "source_proportions": src}


@dataclasses.dataclass
class LabelShiftEstimate:
    """The estimate of the target class proportions and what it rests on (plain values: goes into summaries)."""

    estimator: str  # "bbse" or "em"
    source_proportions: List[float]  # class shares of the labelled source-validation rows
    target_proportions: List[float]  # estimated class shares of the target
    ratios: List[float]  # target / source, capped at max_ratio: the class weights for alignment
    interval_low: List[float]  # bootstrap 2.5% quantile of each target proportion
    interval_high: List[float]  # bootstrap 97.5% quantile
    total_variation: float  # ½ Σ |π̂_t − π_s|
    shifted: bool  # reliable, some class's interval excludes its source share, and TV > min_tv
    reliable: bool  # BBSE and EM agree within MAX_DISAGREEMENT (both assume p(x | y) is the same in both domains)
    disagreement: Optional[float]  # total variation between the BBSE and EM point estimates (None: one only)
    predicted_label_p_value: Optional[float]  # χ² test of predicted-class counts, source-val vs target
    notes: List[str]  # fall-backs, caps and clips, in plain words
    estimated_from: str = ""  # which model's predictions (set by the caller)

    def as_dict(self) -> Dict[str, Any]:
        from ..plain import to_plain

        return to_plain(dataclasses.asdict(self))


def _estimate_once(estimator: str, ps, y, pt, src, calibrated, max_ratio, min_per_class):
    if estimator == "bbse":
        return bbse(ps, y, pt, max_ratio=max_ratio, min_per_class=min_per_class)
    return em_priors(calibrated(pt), src, max_ratio=max_ratio)


def estimate_label_shift(source_probs: Any, source_labels: Any, target_probs: Any, *, estimator: str = "bbse",
                         n_bootstrap: int = 200, seed: int = 0, max_ratio: float = MAX_RATIO,
                         min_per_class: int = MIN_PER_CLASS, min_tv: float = 0.05) -> LabelShiftEstimate:
    """Estimate the target class proportions from a source-trained classifier's probabilities on labelled source
    validation and on the target, with a bootstrap interval and a verdict on "no label shift".

    ``estimator="bbse"`` falls back to EM (and says so in ``notes``) when the confusion matrix is singular or its
    condition number exceeds :data:`MAX_CONDITION`. The other estimator is computed too, as a check: both assume
    that each class looks the same in both domains, and when they disagree by more than :data:`MAX_DISAGREEMENT`
    (as they do when the domains also differ in appearance, the usual case in adaptation) the estimate is marked
    unreliable and ``shifted`` is false — label shift is then unknown, not absent. A class with fewer than ``min_per_class`` source-validation
    samples, or absent from the source, raises ``ValueError`` naming the class and its count. ``shifted`` is true
    when some class's 95% bootstrap interval excludes its source share *and* the total variation between the
    estimate and the source shares exceeds ``min_tv``, and the estimate is reliable (ours: 0.05, so that a statistically clear but tiny
    difference does not count as a shift worth acting on).

    Example:
        >>> rng = np.random.default_rng(0)
        >>> est = estimate_label_shift(np.eye(2)[[0, 1] * 20], [0, 1] * 20, np.eye(2)[[0] * 30 + [1] * 10],
        ...                            n_bootstrap=50)
        >>> [round(v, 2) for v in est.target_proportions], est.shifted
        ([0.75, 0.25], True)
    """
    from scipy.stats import chi2_contingency

    owner = "estimate_label_shift"
    check_choice("estimator", owner, estimator, ["bbse", "em"])
    check_number("n_bootstrap", owner, n_bootstrap, low=0, integer=True)
    ps, pt = _probs(source_probs, "source_probs", owner), _probs(target_probs, "target_probs", owner)
    k = ps.shape[1]
    y = _labels(source_labels, k, owner)
    counts = _check_classes(y, k, owner, min_per_class)
    src = counts / counts.sum()
    calibrated = calibrate(ps, y)
    notes: List[str] = []
    if estimator == "bbse":
        c = np.zeros((k, k))
        np.add.at(c, (ps.argmax(1), y), 1.0 / len(y))
        cond = float(np.linalg.cond(c))
        if not np.isfinite(cond) or cond > MAX_CONDITION:
            notes.append(f"the source-validation confusion matrix is ill-conditioned (condition number "
                         f"{cond:.3g} > {MAX_CONDITION:g}); used EM prior re-estimation instead of BBSE")
            estimator = "em"
    point = _estimate_once(estimator, ps, y, pt, src, calibrated, max_ratio, min_per_class)
    notes += point["notes"]
    rng = np.random.default_rng(seed)
    draws = []
    for _ in range(n_bootstrap):
        i, j = rng.integers(0, len(ps), len(ps)), rng.integers(0, len(pt), len(pt))
        if len(np.unique(y[i])) < k:  # a resample that lost a class says nothing about it
            continue
        try:
            draws.append(_estimate_once(estimator, ps[i], y[i], pt[j], src, calibrated, max_ratio, 1)["proportions"])
        except ValueError:  # a singular resampled confusion matrix
            continue
    q = point["proportions"]
    if draws:
        lo, hi = np.quantile(np.array(draws), [0.025, 0.975], axis=0)
    else:
        lo, hi = q.copy(), q.copy()
        notes.append("no bootstrap resample could be estimated; the interval is the point estimate")
    tv = float(0.5 * np.abs(q - src).sum())
    other = "em" if estimator == "bbse" else "bbse"
    try:  # the other estimator, as a check: both rest on p(x | y) being the same in both domains
        q_other = _estimate_once(other, ps, y, pt, src, calibrated, max_ratio, min_per_class)["proportions"]
        disagreement: Optional[float] = float(0.5 * np.abs(q - q_other).sum())
    except ValueError:
        disagreement = None
    reliable = disagreement is not None and disagreement <= MAX_DISAGREEMENT
    if disagreement is None:
        notes.append(f"only {estimator.upper()} could be computed, so the estimate could not be cross-checked; it is "
                     "not acted on")
    elif not reliable:
        notes.append(f"BBSE and EM disagree (total variation {disagreement:.2f} > {MAX_DISAGREEMENT:g}): the domains "
                     "likely differ in more than their class proportions (the classes look different, p(x | y) "
                     "changed), which both estimators assume away; the estimate is not acted on")
    shifted = bool(reliable and ((lo > src) | (hi < src)).any() and tv > min_tv)
    table = np.stack([np.bincount(ps.argmax(1), minlength=k), np.bincount(pt.argmax(1), minlength=k)])
    table = table[:, table.sum(0) > 0]
    p_value = float(chi2_contingency(table)[1]) if table.shape[1] > 1 else None
    return LabelShiftEstimate(estimator, src.tolist(), q.tolist(), (q / src).tolist(), lo.tolist(), hi.tolist(),
                              tv, shifted, reliable, disagreement, p_value, notes)


def class_ratios(estimate: LabelShiftEstimate) -> np.ndarray:
    """The per-class source weights an estimate implies, w_y = π̂_t(y) / π_s(y) (capped), as an array."""
    return np.asarray(estimate.ratios, dtype=np.float64)
