"""How far apart two domains are, and how trustworthy a classifier's probabilities are.

Pure functions over arrays: numpy arrays or torch tensors (any device; converted to float64 numpy here).
Nothing in this module trains a network or reads a loader.

Distances between feature sets
    :func:`proxy_a_distance`  — scale-free, classifier-based (Ben-David et al. 2007).
    :func:`mmd2_between`      — kernel two-sample statistic (Gretton et al. 2012).
    :func:`coral_between`     — second-order statistics (Sun & Saenko 2016).
    :func:`relative_to_source_halves` — MMD² and CORAL over the same distance between two source halves.
    :func:`shift_report`      — all of them, before vs after adaptation.
Probabilities and labels
    :func:`accuracy`, :func:`expected_calibration_error` (Guo et al. 2017),
    :func:`label_shift_check` (warns with :class:`LabelShiftWarning`).

MMD² and the CORAL distance depend on the scale of the features: an encoder that shrinks every feature towards
zero lowers both without aligning anything. Compare them only between feature sets of the same space and scale;
the proxy A-distance does not have this trap, and neither do their ratios to the distance between two halves of the
source (:func:`relative_to_source_halves`), which is what :func:`shift_report` compares across spaces.
"""
from __future__ import annotations

import dataclasses
import warnings
from typing import Any, Dict, Mapping, Optional, Sequence, Tuple, Union

import numpy as np

from adaptkit._checks import check_number

__all__ = [
    "accuracy",
    "expected_calibration_error",
    "proxy_a_distance",
    "mmd2_between",
    "coral_between",
    "LabelShiftWarning",
    "LabelShiftRecord",
    "label_shift_check",
    "relative_to_source_halves",
    "shift_report",
]


# --------------------------------------------------------------------------------------------------------------
# Input checks shared with adaptkit.select (one wording for every score and diagnostic).
# --------------------------------------------------------------------------------------------------------------

def _to_numpy(x: Any) -> np.ndarray:
    """numpy array from a numpy array, torch tensor (any device / dtype) or nested sequence."""
    if hasattr(x, "detach") and hasattr(x, "cpu"):  # torch.Tensor, without importing torch here
        x = x.detach().cpu()
        if x.is_floating_point():
            x = x.double()  # bfloat16 / half have no numpy equivalent
        x = x.numpy()
    return np.asarray(x)


def _matrix(x: Any, name: str, owner: str, *, min_rows: int = 1, why: str = "") -> np.ndarray:
    """A finite float64 ``(n, d)`` array with ``n >= min_rows``, or a ValueError naming ``owner`` and ``name``."""
    if x is None:
        raise ValueError(f"The {name!r} input of {owner} is required. Got None instead.")
    a = _to_numpy(x)
    if a.ndim != 2:
        raise ValueError(f"The {name!r} input of {owner} must be a 2-D array of shape (n, d). Got shape {a.shape}.")
    if not (np.issubdtype(a.dtype, np.number) or a.dtype == bool):
        raise ValueError(f"The {name!r} input of {owner} must be numeric. Got dtype {a.dtype}.")
    a = a.astype(np.float64, copy=False)
    n = a.shape[0]
    if n == 0:
        raise ValueError(f"The {name!r} input of {owner} is empty (0 samples): an empty domain cannot be scored.")
    if n < min_rows:
        raise ValueError(
            f"The {name!r} input of {owner} needs at least {min_rows} samples{why}. Got {n}."
        )
    if a.shape[1] == 0:
        raise ValueError(f"The {name!r} input of {owner} has 0 columns. Got shape {a.shape}.")
    bad = ~np.isfinite(a)
    if bad.any():
        raise ValueError(
            f"The {name!r} input of {owner} contains NaN or infinite values ({int(bad.sum())} of {a.size} entries)."
        )
    return a


def _probs(x: Any, name: str, owner: str, *, min_rows: int = 1, why: str = "") -> np.ndarray:
    """Like :func:`_matrix`, and each row must be a probability vector (catches logits passed by mistake)."""
    p = _matrix(x, name, owner, min_rows=min_rows, why=why)
    # float32 softmax over many classes drifts from 1 by ~1e-6·K; 1e-3 separates that from logits
    row_sums = p.sum(axis=1)
    if (p < -1e-6).any() or np.abs(row_sums - 1.0).max() > 1e-3:
        worst = int(np.argmax(np.abs(row_sums - 1.0)))
        raise ValueError(
            f"The {name!r} input of {owner} must hold class probabilities (non-negative rows summing to 1); "
            f"row {worst} sums to {row_sums[worst]:.6g} (min entry {p.min():.6g}). Apply softmax to logits first."
        )
    return np.clip(p, 0.0, 1.0)


def _labels(y: Any, name: str, owner: str, *, n: int, n_classes: int) -> np.ndarray:
    """Integer labels in ``[0, n_classes)`` of length ``n``."""
    if y is None:
        raise ValueError(f"The {name!r} input of {owner} is required. Got None instead.")
    a = _to_numpy(y)
    if a.ndim != 1 or a.shape[0] != n:
        raise ValueError(
            f"The {name!r} input of {owner} must have shape ({n},) to match the probabilities. Got shape {a.shape}."
        )
    if a.dtype.kind == "f":
        if not np.all(np.isfinite(a)) or not np.all(a == np.round(a)):
            raise ValueError(f"The {name!r} input of {owner} must hold integer class indices.")
    elif a.dtype.kind not in "iu":
        raise ValueError(f"The {name!r} input of {owner} must hold integer class indices. Got dtype {a.dtype}.")
    a = a.astype(np.int64)
    if n and (a.min() < 0 or a.max() >= n_classes):
        raise ValueError(
            f"The {name!r} input of {owner} must hold class indices in [0, {n_classes - 1}] "
            f"(unlabelled rows, -1, have no place here). Got values in [{a.min()}, {a.max()}]."
        )
    return a


def _same_width(a: np.ndarray, b: np.ndarray, names: Tuple[str, str], owner: str) -> None:
    if a.shape[1] != b.shape[1]:
        raise ValueError(
            f"The {names[0]!r} and {names[1]!r} inputs of {owner} must have the same number of columns. "
            f"Got {a.shape[1]} and {b.shape[1]}."
        )


def _entropy_rows(p: np.ndarray) -> np.ndarray:
    """Shannon entropy (nats) of each row, with 0·log 0 = 0."""
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(p > 0, p * np.log(np.where(p > 0, p, 1.0)), 0.0)
    return -terms.sum(axis=1)


# --------------------------------------------------------------------------------------------------------------
# Probabilities and labels
# --------------------------------------------------------------------------------------------------------------

def accuracy(probs: Any, labels: Any) -> float:
    """Fraction of rows whose arg-max class equals the label.

    Shape: probs ``(n, K)``, labels ``(n,)`` → float in [0, 1].

    >>> accuracy([[0.9, 0.1], [0.3, 0.7]], [0, 0])
    0.5
    """
    p = _probs(probs, "probs", "accuracy")
    y = _labels(labels, "labels", "accuracy", n=p.shape[0], n_classes=p.shape[1])
    return float(np.mean(p.argmax(axis=1) == y))


def expected_calibration_error(probs: Any, labels: Any, n_bins: int = 15) -> float:
    """Expected calibration error with equal-width confidence bins (Guo, Pleiss, Sun & Weinberger, ICML 2017, eq. 3).

    ``ECE = Σ_m |B_m|/n · |acc(B_m) − conf(B_m)|``, where confidence is the largest class probability and bin ``m``
    holds confidences in ``((m−1)/M, m/M]``. Lower is better; 0 means perfectly calibrated on this sample.

    Shape: probs ``(n, K)``, labels ``(n,)`` → float in [0, 1].

    >>> round(expected_calibration_error([[0.9, 0.1], [0.9, 0.1]], [0, 1]), 6)   # confident, half right
    0.4
    """
    owner = "expected_calibration_error"
    n_bins = check_number("n_bins", owner, n_bins, low=1, integer=True)
    p = _probs(probs, "probs", owner)
    y = _labels(labels, "labels", owner, n=p.shape[0], n_classes=p.shape[1])
    conf = p.max(axis=1)
    correct = (p.argmax(axis=1) == y).astype(np.float64)
    bins = np.clip(np.ceil(conf * n_bins).astype(np.int64) - 1, 0, n_bins - 1)  # right-closed bins
    count = np.bincount(bins, minlength=n_bins).astype(np.float64)
    gap = np.abs(np.bincount(bins, weights=correct, minlength=n_bins) - np.bincount(bins, weights=conf, minlength=n_bins))
    # Σ_m |B_m|/n · |acc_m − conf_m| = Σ_m |Σ_{i∈B_m}(correct_i − conf_i)| / n
    return float(gap.sum() / count.sum())


class LabelShiftWarning(UserWarning):
    """The predicted target class proportions differ markedly from the source class proportions."""


@dataclasses.dataclass(frozen=True)
class LabelShiftRecord:
    source_proportions: np.ndarray  # (K,) class proportions on the source
    target_proportions: np.ndarray  # (K,) predicted class proportions on the target (mean probability)
    total_variation: float  # ½ Σ_k |source_k − target_k|, in [0, 1]
    threshold: float  # the threshold the distance was compared with
    shifted: bool  # total_variation > threshold


def label_shift_check(target_probs: Any, *, source_labels: Any = None, source_proportions: Any = None,
                      threshold: float = 0.1, warn: bool = True) -> LabelShiftRecord:
    """Compare predicted target class proportions with source class proportions; warn when they differ.

    Aligning marginal feature distributions (DANN, MMD, CORAL, ...) implicitly assumes the classes are about equally
    frequent in both domains. When they are not, a perfectly aligned encoder must map some source class onto a
    different target class, and alignment can *raise* target error (Zhao, Combes, Zhang & Gordon, "On learning
    invariant representations for domain adaptation", ICML 2019 [memory]). This check is a cheap alarm, not an
    estimate: target proportions are the mean predicted probability ("probabilistic classify and count"), which is
    itself biased by the classifier's errors under shift; BBSE (Lipton, Wang & Smola, ICML 2018) corrects that.

    Distance: total variation ``TV = ½ Σ_k |π_s(k) − π̂_t(k)|`` in [0, 1]. ``threshold=0.1`` is a heuristic: with
    two classes it flags e.g. 50/50 on source against 40/60 predicted on target.

    Give exactly one of ``source_labels`` (integer labels, shape ``(n_s,)``) or ``source_proportions`` (shape ``(K,)``,
    non-negative, summing to 1).

    Shape: target_probs ``(n_t, K)`` → :class:`LabelShiftRecord`. Emits :class:`LabelShiftWarning` when
    ``warn`` and ``TV > threshold``.

    >>> r = label_shift_check([[0.9, 0.1], [0.8, 0.2]], source_proportions=[0.5, 0.5], warn=False)
    >>> round(r.total_variation, 3), r.shifted
    (0.35, True)
    """
    owner = "label_shift_check"
    threshold = check_number("threshold", owner, threshold, low=0.0, high=1.0)
    p = _probs(target_probs, "target_probs", owner)
    k = p.shape[1]
    if (source_labels is None) == (source_proportions is None):
        raise ValueError(f"{owner} needs exactly one of 'source_labels' or 'source_proportions'.")
    if source_labels is not None:
        y = _to_numpy(source_labels).reshape(-1)
        if y.size == 0:
            raise ValueError(f"The 'source_labels' input of {owner} is empty (0 samples).")
        y = _labels(y, "source_labels", owner, n=y.size, n_classes=k)
        src = np.bincount(y, minlength=k).astype(np.float64) / y.size
    else:
        src = _to_numpy(source_proportions).astype(np.float64).reshape(-1)
        if src.shape != (k,) or not np.all(np.isfinite(src)) or (src < 0).any() or abs(src.sum() - 1) > 1e-6:
            raise ValueError(
                f"The 'source_proportions' input of {owner} must be {k} non-negative numbers summing to 1 "
                f"(one per class of 'target_probs'). Got {src.tolist()}."
            )
    tgt = p.mean(axis=0)
    tv = float(0.5 * np.abs(src - tgt).sum())
    record = LabelShiftRecord(src, tgt, tv, float(threshold), tv > threshold)
    if warn and record.shifted:
        warnings.warn(
            f"Predicted target class proportions {np.round(tgt, 3).tolist()} differ from the source proportions "
            f"{np.round(src, 3).tolist()} by total variation {tv:.3f} (threshold {threshold}). Marginal feature "
            f"alignment assumes roughly equal class proportions across domains and can hurt target accuracy when "
            f"they differ (Zhao et al., ICML 2019); consider class-weighted alignment (class_weights=estimated or reestimated).",
            LabelShiftWarning,
            stacklevel=2,
        )
    return record


# --------------------------------------------------------------------------------------------------------------
# Distances between two feature sets
# --------------------------------------------------------------------------------------------------------------

def proxy_a_distance(feats_a: Any, feats_b: Any, seed: int = 0, *,
                     c_grid: Sequence[float] = (0.001, 0.01, 0.1, 1.0)) -> float:
    """Proxy A-distance ``d_A = 2(1 − 2ε)`` between two feature sets (Ben-David, Blitzer, Crammer & Pereira,
    NeurIPS 2007; procedure of Ganin et al., JMLR 17, 2016).

    Procedure: the larger set is subsampled to the size of the smaller (balanced domains, so chance error is ½);
    the pooled features are split in halves stratified by domain; for each ``C`` in ``c_grid`` a linear SVM
    (``sklearn.svm.LinearSVC`` on standardised features, scaler fitted on the training half) learns to tell the
    domains apart on one half; ``ε`` is the lowest error on the other half. Taking the lowest held-out error over
    the grid, as the published procedure does, biases ``ε`` slightly down (``d_A`` slightly up) on small samples.

    The result is clipped to [0, 2]: a classifier worse than chance (``ε > ½``, sampling noise on indistinguishable
    domains) reports 0. 0 means the domains look alike to a linear classifier; 2 means they are linearly separable.
    Deterministic for a given ``seed``.

    Shape: feats_a ``(n_a, d)``, feats_b ``(n_b, d)``, each with at least 2 rows → float in [0, 2].

    >>> rng = np.random.default_rng(0)
    >>> proxy_a_distance(rng.normal(size=(200, 3)), rng.normal(size=(200, 3)) + 20.0)
    2.0
    """
    owner = "proxy_a_distance"
    why = " (one per half of the held-out split)"
    a = _matrix(feats_a, "feats_a", owner, min_rows=2, why=why)
    b = _matrix(feats_b, "feats_b", owner, min_rows=2, why=why)
    _same_width(a, b, ("feats_a", "feats_b"), owner)
    c_grid = [check_number("c_grid", owner, c, low=0.0, low_open=True) for c in c_grid]
    if not c_grid:
        raise ValueError(f"The 'c_grid' parameter of {owner} must hold at least one value. Got an empty grid.")

    from sklearn.model_selection import train_test_split
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import LinearSVC

    rng = np.random.default_rng(seed)
    n = min(len(a), len(b))
    a = a[rng.choice(len(a), n, replace=False)] if len(a) > n else a
    b = b[rng.choice(len(b), n, replace=False)] if len(b) > n else b
    x = np.concatenate([a, b])
    y = np.concatenate([np.zeros(n, dtype=np.int64), np.ones(n, dtype=np.int64)])
    x_tr, x_te, y_tr, y_te = train_test_split(x, y, test_size=0.5, stratify=y, random_state=seed)
    errors = []
    for c in c_grid:
        # primal when samples outnumber dimensions (faster, converges on separable data)
        svm = LinearSVC(C=c, dual=len(x_tr) <= x.shape[1], max_iter=10_000, random_state=seed)
        clf = make_pipeline(StandardScaler(), svm).fit(x_tr, y_tr)
        errors.append(float(np.mean(clf.predict(x_te) != y_te)))
    eps = min(errors)
    return float(np.clip(2.0 * (1.0 - 2.0 * eps), 0.0, 2.0))


def mmd2_between(feats_a: Any, feats_b: Any, *, bandwidth: Optional[float] = None, unbiased: bool = False,
                 max_samples: Optional[int] = 2000, seed: int = 0) -> float:
    """Squared maximum mean discrepancy with a Gaussian kernel (Gretton, Borgwardt, Rasch, Schölkopf & Smola,
    JMLR 13, 2012, eqs. 3 and 5), computed by the training loss :func:`adaptkit.losses.mmd2` (one kernel, float64).

    ``k(x, y) = exp(−‖x − y‖² / γ)`` with ``γ = bandwidth``, in units of *squared* distance — adaptkit's one
    bandwidth convention, the training loss's (DAN's form, Long et al., ICML 2015, §3), so a diagnostic and a
    training loss at the same γ are the same number. ``γ`` defaults to the median heuristic on squared distances:
    the median squared distance between distinct points of the pooled sample (the lower middle value for an even
    count, as ``torch.median``). In σ terms γ = 2σ²: this γ₀ is half the γ of "σ = median distance".
    With ``m = n_a``, ``n = n_b``:

    * biased (default, the V-statistic, always ≥ 0):
      ``MMD²_b = 1/m² Σ_ij k(a_i, a_j) + 1/n² Σ_ij k(b_i, b_j) − 2/(mn) Σ_ij k(a_i, b_j)``;
    * ``unbiased=True`` (the U-statistic): the within-domain sums drop ``i = j`` and divide by ``m(m−1)``,
      ``n(n−1)``; it can be slightly negative when the domains match.

    Cost is quadratic in the sample size, so each set is randomly subsampled (``seed``) to at most ``max_samples``
    rows; ``max_samples=None`` uses everything.

    Shape: feats_a ``(n_a, d)``, feats_b ``(n_b, d)`` → float.

    >>> x = np.array([[0.0], [1.0]])
    >>> mmd2_between(x, x)
    0.0
    """
    import torch  # on demand: the rest of this module is numpy only

    from adaptkit.losses import mmd2

    owner = "mmd2_between"
    need = 2 if unbiased else 1
    why = " (the unbiased estimate leaves out self-pairs)" if unbiased else ""
    a = _matrix(feats_a, "feats_a", owner, min_rows=need, why=why)
    b = _matrix(feats_b, "feats_b", owner, min_rows=need, why=why)
    _same_width(a, b, ("feats_a", "feats_b"), owner)
    if bandwidth is not None:
        bandwidth = check_number("bandwidth", owner, bandwidth, low=0.0, low_open=True)
    if max_samples is not None:
        max_samples = check_number("max_samples", owner, max_samples, low=2, integer=True)
        rng = np.random.default_rng(seed)
        a = a[rng.choice(len(a), max_samples, replace=False)] if len(a) > max_samples else a
        b = b[rng.choice(len(b), max_samples, replace=False)] if len(b) > max_samples else b
    fa, fb = (torch.from_numpy(np.ascontiguousarray(x)) for x in (a, b))  # float64; from_numpy refuses negative strides
    value = mmd2(fa, fb, "unbiased" if unbiased else "biased", n_kernels=1,
                 bandwidths=None if bandwidth is None else [float(bandwidth)])
    return float(value)


def coral_between(feats_a: Any, feats_b: Any) -> float:
    """CORAL distance ``‖C_a − C_b‖²_F / (4d²)`` between feature covariances (Sun & Saenko, ECCV 2016 workshops,
    "Deep CORAL", eqs. 1–3).

    ``C = (Dᵀ D − (1ᵀ D)ᵀ (1ᵀ D) / n) / (n − 1)`` is the unbiased covariance of the ``(n, d)`` features ``D``.

    Shape: feats_a ``(n_a, d)``, feats_b ``(n_b, d)``, each with at least 2 rows → float ≥ 0.

    >>> coral_between([[0.0], [2.0]], [[0.0], [0.0]])   # variances 2 and 0: (2 − 0)² / 4
    1.0
    """
    owner = "coral_between"
    why = " (a covariance needs two)"
    a = _matrix(feats_a, "feats_a", owner, min_rows=2, why=why)
    b = _matrix(feats_b, "feats_b", owner, min_rows=2, why=why)
    _same_width(a, b, ("feats_a", "feats_b"), owner)
    d = a.shape[1]
    c_a = np.cov(a, rowvar=False, ddof=1).reshape(d, d)
    c_b = np.cov(b, rowvar=False, ddof=1).reshape(d, d)
    return float(((c_a - c_b) ** 2).sum() / (4.0 * d * d))


FeaturePair = Union[Mapping[str, Any], Tuple[Any, Any]]


def _pair(x: FeaturePair, name: str) -> Tuple[Any, Any]:
    if isinstance(x, Mapping):
        missing = {"source", "target"} - set(x)
        if missing:
            raise ValueError(
                f"The {name!r} input of shift_report must have keys 'source' and 'target'. Got keys {sorted(x)}."
            )
        return x["source"], x["target"]
    if isinstance(x, (tuple, list)) and len(x) == 2:
        return x[0], x[1]
    raise ValueError(
        f"The {name!r} input of shift_report must be a mapping {{'source': feats, 'target': feats}} or a "
        f"(source, target) pair. Got {type(x).__name__}."
    )


def _median_sq_distance(x: np.ndarray) -> float:
    """The median squared distance between distinct rows of ``x`` (the lower middle value for an even count, as
    ``torch.median``): the median heuristic :func:`mmd2_between` uses, computed once so several MMD² share a kernel.
    A zero median (all rows equal) is replaced by 1, as in :func:`adaptkit.losses.mmd_bandwidths`."""
    norms = (x * x).sum(1)
    sq = np.maximum(norms[:, None] + norms[None, :] - 2.0 * x @ x.T, 0.0)[~np.eye(len(x), dtype=bool)]
    g = float(np.sort(sq)[(sq.size - 1) // 2])
    return g if g > 0 else 1.0


def relative_to_source_halves(source: Any, target: Any, *, seed: int = 0,
                              max_samples: Optional[int] = 1000) -> Dict[str, float]:
    """MMD² and the CORAL distance between the domains, each divided by the same distance between two random halves
    of the source — a scale-free number, comparable between input space and feature space.

    Procedure (``seed`` fixes every draw): the source rows are permuted (``numpy.random.default_rng(seed)``) and cut
    into halves ``A`` and ``B`` of ``h = min(n_s // 2, n_t, max_samples)`` rows each; ``h`` target rows are drawn
    without replacement. Then ``ratio = d(A, target rows) / d(A, B)`` for ``d`` = biased MMD² (one Gaussian kernel,
    bandwidth = the median heuristic on the pooled ``A``, ``B`` and target rows, the same kernel for both terms) and
    ``d`` = CORAL distance. Both terms use ``h`` rows per side, so their finite-sample biases are alike: a ratio
    near 1 means the target is no further from the source than the source is from itself at this sample size;
    10 means ten times further. Rescaling the features leaves the ratio unchanged (MMD²: the bandwidth follows the
    scale; CORAL: both terms scale by the fourth power), which is what makes input and feature space comparable.

    Shape: source ``(n_s, d)`` with ``n_s >= 4``, target ``(n_t, d)`` with ``n_t >= 2`` →
    ``{"mmd2_over_source_halves": float, "coral_over_source_halves": float}``.

    >>> rng = np.random.default_rng(0)
    >>> s, t = rng.normal(size=(400, 2)), rng.normal(size=(200, 2)) + 3.0
    >>> r, r100 = relative_to_source_halves(s, t), relative_to_source_halves(100 * s, 100 * t)
    >>> r["mmd2_over_source_halves"] > 10, bool(np.isclose(r["coral_over_source_halves"], r100["coral_over_source_halves"]))
    (True, True)
    """
    owner = "relative_to_source_halves"
    s = _matrix(source, "source", owner, min_rows=4, why=" (two halves of at least two rows each)")
    t = _matrix(target, "target", owner, min_rows=2, why=" (a covariance needs two)")
    _same_width(s, t, ("source", "target"), owner)
    rng = np.random.default_rng(seed)
    h = min(len(s) // 2, len(t), max_samples or len(s))
    perm = rng.permutation(len(s))
    a, b = s[perm[:h]], s[perm[h:2 * h]]
    tt = t[rng.choice(len(t), h, replace=False)]
    gamma = _median_sq_distance(np.concatenate([a, b, tt]))
    halves_mmd = mmd2_between(a, b, bandwidth=gamma, max_samples=None)
    halves_coral = coral_between(a, b)
    tiny = np.finfo(np.float64).tiny  # two identical halves: the ratio is then huge, not a division by zero
    return {"mmd2_over_source_halves": mmd2_between(a, tt, bandwidth=gamma, max_samples=None) / max(halves_mmd, tiny),
            "coral_over_source_halves": coral_between(a, tt) / max(halves_coral, tiny)}


def shift_report(before: FeaturePair, after: FeaturePair, *, seed: int = 0) -> Dict[str, float]:
    """Domain distances of the features before and after adaptation, as a flat dict ready to log.

    ``before`` and ``after`` are each ``{"source": (n_s, d), "target": (n_t, d)}`` or a ``(source, target)`` pair;
    the two may live in different spaces (e.g. raw inputs before, learned features after). Keys, for ``tag`` in
    ``before`` and ``after``:

    * ``{tag}/proxy_a_distance`` (in [0, 2], scale-free) and ``change/proxy_a_distance`` = after − before;
    * ``{tag}/mmd2`` and ``{tag}/coral``: the raw distances, each in its own space's units. Input space and feature
      space have different scales and dimensions, so these are **not** compared across ``before``/``after`` and no
      change of them is reported (an encoder that shrinks its features lowers both without aligning anything);
    * ``{tag}/mmd2_over_source_halves`` and ``{tag}/coral_over_source_halves``: the same distances divided by the
      distance between two random halves of the source in that space (:func:`relative_to_source_halves`; about 1
      when the domains look alike), which are comparable across spaces, with
      ``change/mmd2_over_source_halves`` and ``change/coral_over_source_halves`` = after − before. These need at
      least 4 source and 2 target rows; with fewer they are left out.

    >>> rng = np.random.default_rng(0)
    >>> s, t = rng.normal(size=(100, 2)), rng.normal(size=(100, 2)) + 3
    >>> r = shift_report({"source": s, "target": t}, (s, t - 3))   # "adaptation" moved target onto source
    >>> r["change/proxy_a_distance"] < 0, r["change/mmd2_over_source_halves"] < 0, "change/mmd2" in r
    (True, True, False)
    """
    out: Dict[str, float] = {}
    relative = True
    for tag, pair in (("before", before), ("after", after)):
        s, t = _pair(pair, tag)
        out[f"{tag}/proxy_a_distance"] = proxy_a_distance(s, t, seed=seed)
        out[f"{tag}/mmd2"] = mmd2_between(s, t, seed=seed)
        out[f"{tag}/coral"] = coral_between(s, t)
        if relative and len(_to_numpy(s)) >= 4:
            for key, value in relative_to_source_halves(s, t, seed=seed).items():
                out[f"{tag}/{key}"] = value
        else:
            relative = False
    keys = ["proxy_a_distance"]
    if relative:
        keys += ["mmd2_over_source_halves", "coral_over_source_halves"]
    else:
        out = {k: v for k, v in out.items() if "_over_source_halves" not in k}
    for key in keys:
        out[f"change/{key}"] = out[f"after/{key}"] - out[f"before/{key}"]
    return out
