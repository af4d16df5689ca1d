"""Selection scores: numbers computed without target labels that rank runs or checkpoints.

Every score is a pure function whose required arguments are named after the fields of :class:`ScoreInputs`
(``source_feats``, ``source_probs``, ``source_labels``, ``target_feats``, ``target_probs``); :data:`SCORES` maps a
score's name to ``(function, higher_is_better)``, and :func:`compute_scores` runs the ones whose inputs a run has.

Each function returns its natural quantity — a loss stays a loss — so the direction differs between scores:

=====================  ==================  ===========================================================
name                   higher_is_better    needs
=====================  ==================  ===========================================================
source_val_accuracy    True                source_probs, source_labels
iwcv                   False (a risk)      source_feats, source_probs, source_labels, target_feats
dev                    False (a risk)      source_feats, source_probs, source_labels, target_feats
target_entropy         False               target_probs
info_max               True                target_probs
snd                    True                target_probs
reverse_validation     True                source_feats, source_labels, target_feats, target_probs
=====================  ==================  ===========================================================

A run that lacks an input gets ``None`` for the scores that need it (never 0, which would rank it). Inputs that are
present but wrong — NaN, an empty domain, a single target sample, logits where probabilities belong, mismatched
shapes — raise ``ValueError`` naming the score and the reason: a diverged run should be caught where it diverged.

No score here is reliable on its own: on Office-Home with MDD, picking checkpoints by source-validation accuracy,
IWCV or DEV lands within ~0.1 point of one another on average, information maximisation about 1 point higher, and
single domain pairs show picks up to ~8 points below the best (Joo & Klabjan, IW-GAE, Table 2).
"""
from __future__ import annotations

import dataclasses
import inspect
from typing import Any, Callable, Dict, Iterable, Mapping, NamedTuple, Optional, Sequence, Tuple

import numpy as np

from adaptkit._checks import check_number
from adaptkit.measure.diagnostics import _entropy_rows, _labels, _matrix, _probs, _same_width, _to_numpy

__all__ = [
    "ScoreInputs",
    "ScoreUnavailable",
    "ScoreSpec",
    "SCORES",
    "compute_scores",
    "compute_scores_with_reasons",
    "pick_best",
    "density_ratio",
    "dev_risk",
    "source_val_accuracy",
    "iwcv",
    "dev",
    "target_entropy",
    "info_max",
    "snd",
    "reverse_validation",
]

_LOG_EPS = 1e-12  # probabilities are floored here before log: a zero on the true class costs −log 1e-12 ≈ 27.6
_TWO_TARGETS = " (one target sample says nothing about the target distribution)"


@dataclasses.dataclass(frozen=True)
class ScoreInputs:
    """What one run (or checkpoint) exposes for scoring. Arrays are numpy arrays or torch tensors; leave out
    what the run does not have and the scores that need it come back as ``None``."""

    source_feats: Any = None  # (n_v, d) encoder features of the labelled source-validation split
    source_probs: Any = None  # (n_v, K) class probabilities on the source-validation split
    source_labels: Any = None  # (n_v,) integer labels of the source-validation split
    target_feats: Any = None  # (n_t, d) encoder features of the (unlabelled) target
    target_probs: Any = None  # (n_t, K) class probabilities on the target


class ScoreUnavailable(Exception):
    """A score cannot be computed for this run (for instance an input it needs was not given). The message says
    why; :func:`compute_scores` turns it into ``None``."""


class ScoreSpec(NamedTuple):
    fn: Callable[..., float]  # the score function
    higher_is_better: bool  # direction for ranking


# --------------------------------------------------------------------------------------------------------------
# Building blocks
# --------------------------------------------------------------------------------------------------------------

def _domain_log_odds(source_feats: np.ndarray, target_feats: np.ndarray, at: np.ndarray, C: float) -> np.ndarray:
    """log P(target | x) / P(source | x) at ``at`` from a logistic regression fitted on source vs target."""
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    x = np.concatenate([source_feats, target_feats])  # (n_s + n_t, d)
    y = np.concatenate([np.zeros(len(source_feats)), np.ones(len(target_feats))])
    clf = make_pipeline(StandardScaler(), LogisticRegression(C=C, max_iter=1000)).fit(x, y)
    return clf.decision_function(at)  # (n_at,)


def density_ratio(source_feats: Any, target_feats: Any, *, at: Any = None, C: float = 1.0,
                  clip: Optional[float] = None, normalize: bool = False) -> np.ndarray:
    """Importance weights ``w(x) = p_t(x) / p_s(x)`` estimated with a probabilistic domain classifier.

    A logistic regression (``sklearn``, on standardised features, inverse regularisation ``C``) is fitted to tell
    ``source_feats`` (label 0) from ``target_feats`` (label 1). By Bayes' rule

        ``w(x) = (n_s / n_t) · P(target | x) / P(source | x)``,

    the factor ``n_s / n_t`` undoing the class prior of the classifier's training set (as in DEV, You et al.,
    ICML 2019, and Bickel, Brückner & Scheffer, ICML 2007). The odds come from the classifier's log-odds, so
    confident predictions do not overflow. A linear classifier is exact when the log ratio is linear in ``x`` —
    e.g. two Gaussians with a shared covariance — and a smoothed approximation otherwise.

    ``clip``: if given, weights are capped at ``clip`` (in units of the raw ratio, whose source mean is ≈ 1), which
    bounds the variance a few near-target source points can add. ``normalize``: then divide by the mean weight so
    the weights average exactly 1 (self-normalised importance sampling). Clipping happens before normalising.

    Shape: source_feats ``(n_s, d)``, target_feats ``(n_t, d)``, at ``(m, d)`` (default: ``source_feats``) → ``(m,)``.

    >>> rng = np.random.default_rng(0)
    >>> w = density_ratio(rng.normal(size=(500, 1)), rng.normal(size=(500, 1)) + 1.0)
    >>> bool(w[np.argmax(w)] > 1 > w[np.argmin(w)])   # source points near the target get more weight
    True
    """
    owner = "density_ratio"
    s = _matrix(source_feats, "source_feats", owner, min_rows=2, why=" to fit a domain classifier")
    t = _matrix(target_feats, "target_feats", owner, min_rows=2, why=_TWO_TARGETS)
    _same_width(s, t, ("source_feats", "target_feats"), owner)
    at_ = s if at is None else _matrix(at, "at", owner)
    _same_width(s, at_, ("source_feats", "at"), owner)
    C = check_number("C", owner, C, low=0.0, low_open=True)
    log_w = _domain_log_odds(s, t, at_, C) + np.log(len(s) / len(t))
    w = np.exp(np.clip(log_w, -700.0, 700.0))  # stay inside float64
    if clip is not None:
        clip = check_number("clip", owner, clip, low=0.0, low_open=True)
        w = np.minimum(w, clip)
    if normalize:
        w = w / w.mean()
    return w


def dev_risk(losses: Any, weights: Any) -> float:
    """Deep embedded validation risk from per-sample losses and importance weights (You, Wang, Long & Jordan,
    "Towards accurate model selection in deep unsupervised domain adaptation", ICML 2019 [memory, structure
    corroborated]).

    With ``L_i = w_i ℓ_i`` and ``W_i = w_i`` on the labelled source-validation split, ``E_s[W] = 1`` makes ``W`` a
    control variate for ``mean(L)``::

        η = −Cov(L, W) / Var(W)          (sample covariance and variance, both with n − 1)
        R = mean(L) + η·mean(W) − η

    If ``Var(W) = 0`` there is nothing to correct with and ``η = 0``, so ``R = mean(L)``. With weights normalised to
    mean exactly 1 the correction vanishes and ``R`` equals the self-normalised IWCV risk — DEV therefore takes raw
    (unnormalised) weights. Lower is better.

    Shape: losses ``(n,)``, weights ``(n,)``, n ≥ 2 → float.

    >>> dev_risk([1.0, 2.0], [1.0, 1.0])   # constant weights: plain mean loss
    1.5
    """
    owner = "dev_risk"
    ell = _matrix(_to_numpy(losses).reshape(-1, 1), "losses", owner, min_rows=2, why=" (a covariance needs two)")[:, 0]
    w = _matrix(_to_numpy(weights).reshape(-1, 1), "weights", owner, min_rows=2, why=" (a covariance needs two)")[:, 0]
    if len(ell) != len(w):
        raise ValueError(f"The 'losses' and 'weights' inputs of {owner} must have the same length. "
                         f"Got {len(ell)} and {len(w)}.")
    big_l = w * ell  # (n,)
    var_w = np.var(w, ddof=1)
    cov_lw = np.sum((big_l - big_l.mean()) * (w - w.mean())) / (len(w) - 1)
    eta = 0.0 if var_w <= 1e-300 else -cov_lw / var_w
    return float(big_l.mean() + eta * w.mean() - eta)


def _source_losses(source_probs: Any, source_labels: Any, owner: str, n_rows: int) -> Tuple[np.ndarray, int]:
    """Per-sample cross-entropy −log p_y on the source-validation split, and K."""
    p = _probs(source_probs, "source_probs", owner)
    if len(p) != n_rows:
        raise ValueError(f"The 'source_probs' and 'source_feats' inputs of {owner} must have the same number of rows. "
                         f"Got {len(p)} and {n_rows}.")
    y = _labels(source_labels, "source_labels", owner, n=len(p), n_classes=p.shape[1])
    return -np.log(np.maximum(p[np.arange(len(y)), y], _LOG_EPS)), p.shape[1]


# --------------------------------------------------------------------------------------------------------------
# Scores
# --------------------------------------------------------------------------------------------------------------

def source_val_accuracy(source_probs: Any, source_labels: Any) -> float:
    """Accuracy on the labelled source-validation split: the baseline every label-free score should beat.
    Higher is better.

    ``acc = mean_i [argmax_k p_ik = y_i]``.

    Shape: source_probs ``(n_v, K)``, source_labels ``(n_v,)`` → float in [0, 1].

    >>> source_val_accuracy([[0.8, 0.2], [0.4, 0.6]], [0, 0])
    0.5
    """
    owner = "source_val_accuracy"
    p = _probs(source_probs, "source_probs", owner)
    y = _labels(source_labels, "source_labels", owner, n=len(p), n_classes=p.shape[1])
    return float(np.mean(p.argmax(axis=1) == y))


def iwcv(source_feats: Any, source_probs: Any, source_labels: Any, target_feats: Any, *,
         clip: Optional[float] = 10.0, C: float = 1.0) -> float:
    """Importance-weighted validation risk (Sugiyama, Krauledat & Müller, "Covariate shift adaptation by
    importance weighted cross validation", JMLR 8, 2007 [memory]). **Lower is better** (it is a loss).

    ``R_IW = (1/n_v) Σ_i w_i · ℓ_i``, ``ℓ_i = −log p_{i, y_i}`` (cross-entropy on labelled source validation; p floored
    at 1e-12), ``w = density_ratio(source_feats, target_feats, clip=clip, normalize=True)``: the ratio
    ``p_t/p_s`` from a logistic domain classifier on features, capped at ``clip`` (default 10) and then rescaled
    to mean 1. Under covariate shift ``E_s[w ℓ] = E_t[ℓ]``, so this estimates the target risk.

    Shape: source_feats ``(n_v, d)``, source_probs ``(n_v, K)``, source_labels ``(n_v,)``, target_feats
    ``(n_t, d)``, n_v ≥ 2, n_t ≥ 2 → float ≥ 0.

    >>> rng = np.random.default_rng(0)
    >>> xs, xt = rng.normal(size=(200, 2)), rng.normal(size=(200, 2))
    >>> p = np.full((200, 2), 0.5)
    >>> round(iwcv(xs, p, np.zeros(200, dtype=int), xt), 4)   # every loss is log 2
    0.6931
    """
    owner = "iwcv"
    s = _matrix(source_feats, "source_feats", owner, min_rows=2, why=" to fit a domain classifier")
    t = _matrix(target_feats, "target_feats", owner, min_rows=2, why=_TWO_TARGETS)
    _same_width(s, t, ("source_feats", "target_feats"), owner)
    ell, _ = _source_losses(source_probs, source_labels, owner, len(s))
    w = density_ratio(s, t, C=C, clip=clip, normalize=True)
    return float(np.mean(w * ell))


def dev(source_feats: Any, source_probs: Any, source_labels: Any, target_feats: Any, *,
        clip: Optional[float] = 10.0, C: float = 1.0) -> float:
    """Deep embedded validation risk (You, Wang, Long & Jordan, ICML 2019 [memory, structure corroborated]).
    **Lower is better** (it is a risk).

    Weights ``w = density_ratio(source_feats, target_feats, clip=clip)`` — ``(n_s/n_t)·P(target|f)/P(source|f)``
    from a logistic domain classifier on the features, capped at ``clip`` (default 10), *not* normalised (the
    control variate needs ``mean(W)`` free to differ from 1). Then, with ``ℓ_i = −log p_{i, y_i}``,
    ``L = w·ℓ``, ``W = w``: ``η = −Cov(L, W)/Var(W)``, ``R = mean(L) + η·mean(W) − η`` (see :func:`dev_risk`).

    Shape: as :func:`iwcv` → float.

    >>> rng = np.random.default_rng(0)
    >>> xs, xt = rng.normal(size=(200, 2)), rng.normal(size=(200, 2))
    >>> p = np.full((200, 2), 0.5)
    >>> round(dev(xs, p, np.zeros(200, dtype=int), xt), 4)   # constant loss: the control variate removes all noise
    0.6931
    """
    owner = "dev"
    s = _matrix(source_feats, "source_feats", owner, min_rows=2, why=" to fit a domain classifier")
    t = _matrix(target_feats, "target_feats", owner, min_rows=2, why=_TWO_TARGETS)
    _same_width(s, t, ("source_feats", "target_feats"), owner)
    ell, _ = _source_losses(source_probs, source_labels, owner, len(s))
    w = density_ratio(s, t, C=C, clip=clip)
    return dev_risk(ell, w)


def target_entropy(target_probs: Any) -> float:
    """Mean prediction entropy on the target, in nats (entropy minimisation: Grandvalet & Bengio, "Semi-supervised
    learning by entropy minimization", NeurIPS 2004). **Lower is better** — confident target predictions; note a
    collapsed model that predicts one class everywhere scores best, which :func:`info_max` guards against.

    ``H̄ = (1/n_t) Σ_i −Σ_k p_ik log p_ik`` (with 0·log 0 = 0).

    Shape: target_probs ``(n_t, K)``, n_t ≥ 2 → float in [0, log K].

    >>> round(target_entropy([[0.5, 0.5], [1.0, 0.0]]), 4)   # (log 2 + 0) / 2
    0.3466
    """
    p = _probs(target_probs, "target_probs", "target_entropy", min_rows=2, why=_TWO_TARGETS)
    return float(_entropy_rows(p).mean())


def info_max(target_probs: Any) -> float:
    """Information maximisation: mutual information between target inputs and predicted labels (Krause, Perona &
    Gomes, "Discriminative clustering by regularized information maximization", NeurIPS 2010; used for domain
    adaptation by Shi & Sha, ICML 2012 [memory]). **Higher is better**: confident per sample *and* diverse over
    the target set.

    ``IM = H(p̄) − (1/n_t) Σ_i H(p_i)``, ``p̄ = (1/n_t) Σ_i p_i``, entropies in nats.

    Shape: target_probs ``(n_t, K)``, n_t ≥ 2 → float in [0, log K].

    >>> round(info_max([[1.0, 0.0], [0.0, 1.0]]), 4)   # confident and balanced: log 2
    0.6931
    """
    p = _probs(target_probs, "target_probs", "info_max", min_rows=2, why=_TWO_TARGETS)
    p_bar = p.mean(axis=0, keepdims=True)  # (1, K)
    return float(_entropy_rows(p_bar)[0] - _entropy_rows(p).mean())


def snd(target_probs: Any, *, tau: float = 0.05, chunk: int = 1024) -> float:
    """Soft neighbourhood density (Saito, Kim, Teterwak, Sclaroff, Darrell & Saenko, "Tune it the right way:
    unsupervised validation of domain adaptation via soft neighborhood density", ICCV 2021 [memory; τ
    corroborated]). **Higher is better**: target points sit in dense neighbourhoods of similar predictions.

    ``q_i = p_i / ‖p_i‖₂``; ``s_ij = q_i·q_j`` for ``j ≠ i`` (self-pairs left out);
    ``a_ij = softmax_j(s_ij / τ)`` over the ``n_t − 1`` neighbours; ``SND = (1/n_t) Σ_i −Σ_j a_ij log a_ij``.

    Rows are processed ``chunk`` at a time, so memory is ``O(chunk · n_t)`` rather than ``O(n_t²)``.

    Shape: target_probs ``(n_t, K)``, n_t ≥ 2 → float in [0, log(n_t − 1)].

    >>> round(snd([[1.0, 0.0]] * 5), 4)   # identical predictions: uniform over 4 neighbours, log 4
    1.3863
    """
    owner = "snd"
    p = _probs(target_probs, "target_probs", owner, min_rows=2, why=" (a sample needs at least one neighbour)")
    tau = check_number("tau", owner, tau, low=0.0, low_open=True)
    chunk = check_number("chunk", owner, chunk, low=1, integer=True)
    q = p / np.linalg.norm(p, axis=1, keepdims=True)  # (n, K); rows of a probability vector are never all zero
    n = len(q)
    total = 0.0
    for start in range(0, n, chunk):
        rows = np.arange(start, min(start + chunk, n))
        z = (q[rows] @ q.T) / tau  # (c, n)
        z[np.arange(len(rows)), rows] = -np.inf  # leave out self-pairs
        z -= z.max(axis=1, keepdims=True)
        log_a = z - np.log(np.exp(z).sum(axis=1, keepdims=True))  # log softmax; −inf on the diagonal
        a = np.exp(log_a)
        total += float(-np.where(a > 0, a * np.where(a > 0, log_a, 0.0), 0.0).sum())
    return total / n


def reverse_validation(source_feats: Any, source_labels: Any, target_feats: Any, target_probs: Any, *,
                       C: float = 1.0, seed: int = 0) -> float:
    """Reverse validation (Zhong, Fan, Yang, Verscheure & Ren, ECML PKDD 2010; the selection rule of Ganin et al.,
    "Domain-adversarial training of neural networks", JMLR 17, 2016, §5.1.2 [memory for the section]). **Higher is
    better**: a run whose target pseudo-labels are right lets a classifier trained on them alone recover the source.

    The run's pseudo-labels ``ŷ_i = argmax_k p_ik`` on the target train a *reverse classifier* — here a logistic
    regression (scikit-learn, on standardised features, inverse regularisation ``C``, ``random_state=seed``) on the
    target features — whose accuracy on the labelled source-validation features is the score:
    ``RV = mean_j [η_r(x_j) = y_j]`` over source validation. Ganin et al. train the reverse model with their
    adaptation method, from target (labelled by the run) to source (unlabelled); the plain, unadapted reverse
    classifier on the run's own features is ours.

    A target with a single pseudo-class trains no classifier: the score is unavailable (``None`` with the reason
    through :func:`compute_scores_with_reasons`), as a collapsed run deserves no rank.

    Shape: source_feats ``(n_v, d)``, source_labels ``(n_v,)``, target_feats ``(n_t, d)``, target_probs ``(n_t, K)``,
    n_t ≥ 2 → float in [0, 1].

    >>> rng = np.random.default_rng(0)
    >>> xs, xt = rng.normal(size=(100, 2)), rng.normal(size=(100, 2))
    >>> p = np.eye(2)[(xt[:, 0] > 0).astype(int)]   # pseudo-labels by the sign of the first feature
    >>> reverse_validation(xs, (xs[:, 0] > 0).astype(int), xt, p) > 0.95   # the same rule on the source
    True
    """
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    owner = "reverse_validation"
    s = _matrix(source_feats, "source_feats", owner)
    t = _matrix(target_feats, "target_feats", owner, min_rows=2, why=" to fit a reverse classifier")
    _same_width(s, t, ("source_feats", "target_feats"), owner)
    p = _probs(target_probs, "target_probs", owner, min_rows=2, why=" to fit a reverse classifier")
    if len(p) != len(t):
        raise ValueError(f"The 'target_probs' and 'target_feats' inputs of {owner} must have the same number of rows. "
                         f"Got {len(p)} and {len(t)}.")
    y = _labels(source_labels, "source_labels", owner, n=len(s), n_classes=p.shape[1])
    C = check_number("C", owner, C, low=0.0, low_open=True)
    pseudo = p.argmax(axis=1)
    classes = np.unique(pseudo)
    if len(classes) < 2:
        raise ScoreUnavailable(f"{owner} needs at least two pseudo-classes on the target to fit a reverse "
                               f"classifier; every target sample is predicted class {int(classes[0])}")
    clf = make_pipeline(StandardScaler(), LogisticRegression(C=C, max_iter=1000, random_state=seed)).fit(t, pseudo)
    return float(np.mean(clf.predict(s) == y))


# --------------------------------------------------------------------------------------------------------------
# The table and the runner
# --------------------------------------------------------------------------------------------------------------

PREFIX = "score/"  # how summaries, histories and select= name a score: score/<name>

SCORES: Dict[str, ScoreSpec] = {
    "source_val_accuracy": ScoreSpec(source_val_accuracy, True),
    "iwcv": ScoreSpec(iwcv, False),
    "dev": ScoreSpec(dev, False),
    "target_entropy": ScoreSpec(target_entropy, False),
    "info_max": ScoreSpec(info_max, True),
    "snd": ScoreSpec(snd, True),
    "reverse_validation": ScoreSpec(reverse_validation, True),
}

_INPUT_FIELDS = tuple(f.name for f in dataclasses.fields(ScoreInputs))


def _needs(fn: Callable[..., float]) -> Tuple[str, ...]:
    """The ScoreInputs fields a score function requires: its parameters without a default."""
    needs = tuple(
        name for name, prm in inspect.signature(fn).parameters.items()
        if prm.default is inspect.Parameter.empty and prm.kind is inspect.Parameter.POSITIONAL_OR_KEYWORD
    )
    assert set(needs) <= set(_INPUT_FIELDS), (fn.__name__, needs)  # internal invariant: names match ScoreInputs
    return needs


def _check_names(names: Optional[Iterable[str]]) -> list:
    if names is None:
        return list(SCORES)
    if isinstance(names, str):
        names = [names]
    names = list(names)
    unknown = [n for n in names if n not in SCORES]
    if unknown:
        raise ValueError(
            f"Unknown selection score{'s' if len(unknown) > 1 else ''} {', '.join(map(repr, unknown))}. "
            f"Available selection scores: {', '.join(SCORES)}."
        )
    return names


def compute_scores_with_reasons(inputs: ScoreInputs, names: Optional[Iterable[str]] = None,
                                ) -> Tuple[Dict[str, Optional[float]], Dict[str, str]]:
    """Like :func:`compute_scores`, and also return ``{name: reason}`` for every score that came back ``None``."""
    if not isinstance(inputs, ScoreInputs):
        raise TypeError(f"compute_scores expects a ScoreInputs. Got {type(inputs).__name__}.")
    values: Dict[str, Optional[float]] = {}
    reasons: Dict[str, str] = {}
    for name in _check_names(names):
        fn = SCORES[name].fn
        needs = _needs(fn)
        try:
            missing = [f for f in needs if getattr(inputs, f) is None]
            if missing:
                raise ScoreUnavailable(f"{name} needs {', '.join(missing)}, which the run did not provide")
            values[name] = float(fn(**{f: getattr(inputs, f) for f in needs}))
        except ScoreUnavailable as err:
            values[name] = None
            reasons[name] = str(err)
    return values, reasons


def compute_scores(inputs: ScoreInputs, names: Optional[Iterable[str]] = None) -> Dict[str, Optional[float]]:
    """Compute the selection scores ``names`` (default: all of :data:`SCORES`) for one run.

    Returns ``{name: value}``; a score whose inputs the run lacks is ``None`` — missing, not 0 — and
    :func:`compute_scores_with_reasons` says why. Bad inputs raise ``ValueError`` (see the module docstring);
    an unknown name raises a ``ValueError`` listing the available ones.

    >>> compute_scores(ScoreInputs(target_probs=[[1.0, 0.0], [0.0, 1.0]]), ["info_max", "iwcv"])
    {'info_max': 0.6931471805599453, 'iwcv': None}
    """
    return compute_scores_with_reasons(inputs, names)[0]


def pick_best(candidates: Sequence[Mapping[str, Optional[float]]], name: str) -> Optional[int]:
    """Index of the best candidate (e.g. one :func:`compute_scores` result per checkpoint) on score ``name``,
    using its direction from :data:`SCORES`. Candidates where the score is ``None`` are skipped; returns ``None``
    when every candidate lacks it. Ties go to the earliest candidate. ``name`` may carry the ``score/`` prefix that
    summaries, histories and ``select=`` use; a candidate's value is read under either key.

    >>> pick_best([{"iwcv": 0.9}, {"iwcv": None}, {"iwcv": 0.4}], "iwcv")
    2
    >>> pick_best([{"score/dev": 0.3}, {"score/dev": 0.1}], "score/dev")
    1
    """
    bare = name[len(PREFIX):] if isinstance(name, str) and name.startswith(PREFIX) else name
    sign = 1.0 if SCORES[_check_names([bare])[0]].higher_is_better else -1.0
    best, best_val = None, -np.inf
    for i, c in enumerate(candidates):
        v = c.get(bare) if bare in c else c.get(PREFIX + bare)
        if v is not None and sign * v > best_val:
            best, best_val = i, sign * v
    return best
