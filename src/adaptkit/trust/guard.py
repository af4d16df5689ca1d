"""The do-no-harm guard: keep an adapted model only where label-free evidence favours it over source-only.

Nothing computed without target labels can prove an adapted model better. The guard refuses the adaptations the
evidence speaks *against*, and keeps one only where it speaks *for* it:

1. **Source knowledge kept.** Source-validation accuracy may not fall more than ``max_source_drop`` below the
   source-only model's (an alignment that damaged the source task is unlikely to have helped the target). The
   allowance grows to 3 rows' worth on small validation sets (one row of 40 is already 2.5 points); a
   class-weighted candidate is measured with the source rows weighted by the same class ratios, the accuracy the
   weighted alignment aims to keep.
2. **No unsupported collapse.** No class may all but vanish from the adapted model's target predictions unless
   the (reliable) label-shift estimate says it is rare there (:func:`vanished_classes`): pulling the target onto
   few classes is the typical failure of adversarial alignment. A class-weighted candidate must also predict
   proportions close to the estimate it was weighted by (total variation at most ``max_tv`` plus the estimate's
   own uncertainty).
3. **Label shift handled.** When the estimate detects label shift, an alignment *without* class weights is
   refused (marginal alignment then maps target points to the wrong class; Zhao, Combes, Zhang & Gordon, ICML 2019
   [memory]). When no estimate could be made (too few labelled source-validation rows of a class), the source-only
   model's own target predictions stand in: if their mean predicted class probabilities differ from the source's
   class shares by more than :data:`SUSPECT_TV` (total variation), a label shift is likely and an unweighted
   alignment is refused too. Counting a source-trained classifier's target predictions ("classify and count";
   here the probabilistic variant, averaging probabilities) tends to *under*state a label shift, pulled towards the
   source's shares by the classifier's errors (Forman, "Quantifying counts and costs via classification", Data
   Mining and Knowledge Discovery, 2008 [memory]), so a large difference is strong evidence; covariate shift alone
   can also move it, so it is used only when no estimate exists.
4. **The scores favour it.** Each score of :data:`VOTING_SCORES` compares the two models on the same rows; a
   paired bootstrap gives its spread. A score votes for adaptation when the adapted model is better by more than
   ``z`` bootstrap standard deviations, against it when worse by as much. Adaptation is kept when more scores vote
   for than against it. Only the information-maximisation score votes by default: DEV and IWCV estimate the
   target risk from *source* losses, and the source-only model, which minimises exactly those, wins their vote
   almost always (benchmarks/RESULTS.md, "Designing the guard").

Every check's outcome is written in plain words into the verdict (and from there into the summary and report).
The thresholds are ours (stated once, below); they are not a guarantee.
"""
from __future__ import annotations

import dataclasses
from typing import Any, Dict, List, Optional, Sequence

import numpy as np

__all__ = ["Evidence", "Verdict", "VOTING_SCORES", "evidence_from_outputs", "judge_candidate", "vanished_classes",
           "MAX_SOURCE_DROP", "MAX_TV", "Z", "SUSPECT_TV", "suspected_label_shift", "VANISHED_FACTOR",
           "VANISHED_MASS", "SCORES_ACCEPTED", "source_accuracy",
           "source_drop_allowed"]

MAX_SOURCE_DROP = 0.03  # ours: 3 points of source-validation accuracy
MAX_TV = 0.10  # ours: predicted vs estimated target proportions, beyond the estimate's interval half-width
SUSPECT_TV = 0.35  # ours, on tuning seeds: see suspected_label_shift
Z = 2.0  # ours: a score's difference counts when larger than two paired-bootstrap standard deviations
VANISHED_FACTOR = 4.0  # ours: a class "vanishes" when predicted at under a quarter of its expected share …
VANISHED_MASS = 0.2  # ours: … and a collapse is vanished classes holding at least 20% of the expected mass
VOTING_SCORES = ("info_max",)  # ours (measured, see check 4); "iwcv" and "dev" can be passed as ``scores``
SCORES_ACCEPTED = ("info_max", "iwcv", "dev")  # cheap to bootstrap from per-row quantities; source accuracy is check 1


@dataclasses.dataclass
class Evidence:
    """What the guard knows of one trained model, all without target labels (per-row arrays, for the bootstrap)."""

    label: str  # the candidate's name in reasons ("source_only", "dann weight 0.3", ...)
    source_correct: np.ndarray  # (n_v,) 1.0 where the source-validation prediction is right
    source_losses: np.ndarray  # (n_v,) cross-entropy −log p_y on source validation
    source_weights: np.ndarray  # (n_v,) density ratios p_t/p_s of the source-validation rows (raw, capped)
    target_probs: np.ndarray  # (n_t, K) predicted class probabilities on the target
    class_weighted: bool = False  # the alignment used class weights from a label-shift estimate
    source_probs: Optional[np.ndarray] = None  # (n_v, K) predicted probabilities on source validation
    source_labels: Optional[np.ndarray] = None  # (n_v,) their labels

    @property
    def source_proportions(self) -> np.ndarray:
        k = self.target_probs.shape[1]
        if self.source_labels is None:
            return np.full(k, 1.0 / k)
        return np.bincount(self.source_labels, minlength=k) / len(self.source_labels)

    @property
    def source_accuracy(self) -> float:
        return float(self.source_correct.mean())

    @property
    def target_proportions(self) -> np.ndarray:
        return self.target_probs.mean(0)


def evidence_from_outputs(label: str, source_feats, source_probs, source_labels, target_feats, target_probs, *,
                          class_weighted: bool = False, clip: float = 10.0) -> Evidence:
    """Evidence from a model's outputs on labelled source validation and on target inputs (features from the
    source and target encoders; density ratios as in :func:`adaptkit.select.density_ratio`)."""
    from ..select import density_ratio

    ps = np.asarray(source_probs, dtype=np.float64)
    y = np.asarray(source_labels, dtype=np.int64)
    w = density_ratio(np.asarray(source_feats), np.asarray(target_feats), clip=clip)
    return Evidence(label, (ps.argmax(1) == y).astype(np.float64),
                    -np.log(np.maximum(ps[np.arange(len(y)), y], 1e-12)), w,
                    np.asarray(target_probs, dtype=np.float64), class_weighted, ps, y)


def expected_shares(reference: Evidence, estimate=None) -> np.ndarray:
    """The target class shares a collapse is measured against: the smaller of the source share and the
    label-shift estimate per class when the estimate is reliable (a class the estimate says is rare may be rare),
    else the source shares (an unreliable estimate says nothing)."""
    src = reference.source_proportions
    if estimate is not None and getattr(estimate, "reliable", False):
        return np.minimum(src, np.asarray(estimate.target_proportions))
    return src


def vanished_classes(predicted: Sequence[float], reference: Evidence, estimate=None) -> List[int]:
    """Classes whose predicted target share fell under 1/:data:`VANISHED_FACTOR` of their expected share
    (:func:`expected_shares`, those of at least 5%), when together they hold at least :data:`VANISHED_MASS` of
    the expected mass; else ``[]``. The signature of an alignment that pulled the target onto few classes."""
    r = expected_shares(reference, estimate)
    p = np.asarray(predicted, dtype=np.float64)
    gone = [k for k in range(len(r)) if r[k] >= 0.05 and p[k] < r[k] / VANISHED_FACTOR]
    return gone if r[gone].sum() >= VANISHED_MASS else []


def suspected_label_shift(reference: Evidence, estimate=None, threshold: float = SUSPECT_TV) -> Optional[float]:
    """When no label-shift estimate could be made (``estimate is None``), the total variation between the
    source-only model's mean predicted target class probabilities and the source-validation class shares if it exceeds
    ``threshold`` (a label shift is then likely, check 3), else ``None``. With an estimate, ``None``: the estimate
    decides.

    The threshold (ours) was set on the guard benchmark's tuning seeds 100–102 before any test seed was run:
    there the source-only model's mean target predictions moved 0.19–0.29 from the source's shares under the
    covariate shifts with hardly any label shift (shifted blobs, corrupted digits; true target proportions within
    0.09 of the source's) and 0.39–0.48 under the selection-biased wine table's label shift (true 0.41–0.53);
    0.35 lies halfway. Fifteen cells: a rough line, not a calibrated test.

    >>> ref = Evidence("source_only", np.ones(4), np.zeros(4), np.ones(4), np.eye(2)[[1, 1, 1, 0]],
    ...                source_labels=np.array([0, 0, 0, 1]))
    >>> suspected_label_shift(ref)  # predicts [0.25, 0.75] on the target against source shares [0.75, 0.25]
    0.5
    """
    if estimate is not None:
        return None
    tv = float(0.5 * np.abs(reference.target_proportions - reference.source_proportions).sum())
    return tv if tv > threshold else None


def source_drop_allowed(candidate: Evidence, max_source_drop: float = MAX_SOURCE_DROP) -> float:
    """The source-accuracy drop check 1 allows: ``max_source_drop``, or 3 validation rows' worth when that is more.

    >>> e = Evidence("x", np.ones(40), np.zeros(40), np.ones(40), np.full((4, 2), 0.5))
    >>> round(source_drop_allowed(e), 3)
    0.075
    """
    return max(max_source_drop, 3.0 / max(len(candidate.source_correct), 1))


def source_accuracy(e: Evidence, ratios=None) -> float:
    """Source-validation accuracy, each row weighted by its class's target/source ratio when ``ratios`` is given
    (the accuracy on a source resampled to the target's class proportions)."""
    if ratios is None or e.source_labels is None:
        return e.source_accuracy
    w = np.asarray(ratios, dtype=np.float64)[e.source_labels]
    return float((w * e.source_correct).sum() / max(w.sum(), 1e-12))


def _entropy(p: np.ndarray) -> np.ndarray:
    return -(np.where(p > 0, p * np.log(np.maximum(p, 1e-300)), 0.0)).sum(-1)


def _score_on(e: Evidence, score: str, iv: np.ndarray, it: np.ndarray) -> float:
    """The value of ``score`` for evidence ``e`` on source rows ``iv`` and target rows ``it`` (higher = better)."""
    from ..select import dev_risk

    if score == "info_max":
        p = e.target_probs[it]
        return float(_entropy(p.mean(0)) - _entropy(p).mean())
    w, ell = e.source_weights[iv], e.source_losses[iv]
    if score == "iwcv":
        return -float(np.mean(w / w.mean() * ell))
    if score == "dev":
        return -dev_risk(ell, w)
    raise ValueError(f"The guard has no vote for score {score!r}; accepted: {', '.join(SCORES_ACCEPTED)}.")


@dataclasses.dataclass
class Verdict:
    """The guard's decision on one adapted candidate against source-only, and why."""

    keep: bool
    reasons: List[str]  # plain sentences, the deciding ones first
    checks: Dict[str, Any]  # every measured quantity, for the summary

    def as_dict(self) -> Dict[str, Any]:
        from ..plain import to_plain

        return to_plain(dataclasses.asdict(self))


def _fmt(p: Sequence[float]) -> str:
    return "[" + ", ".join(f"{v:.2f}" for v in p) + "]"


def judge_candidate(reference: Evidence, candidate: Evidence, estimate=None, *,
                    max_source_drop: float = MAX_SOURCE_DROP, max_tv: float = MAX_TV, z: float = Z,
                    n_bootstrap: int = 200, seed: int = 0, scores: Sequence[str] = VOTING_SCORES,
                    no_estimate_because: Optional[str] = None) -> Verdict:
    """Compare ``candidate`` (an adapted model) with ``reference`` (source-only) on label-free evidence; see the
    module docstring for the four checks. ``estimate`` is the :class:`~adaptkit.trust.LabelShiftEstimate` made
    from the reference model (``None``: checks 2 and 3 compare with the source-only model's own predictions;
    ``no_estimate_because`` then says why there is none, for the reasons)."""
    reasons: List[str] = []
    checks: Dict[str, Any] = {}
    keep = True
    # 1. source knowledge
    ratios = estimate.ratios if (candidate.class_weighted and estimate is not None) else None
    ref_acc, cand_acc = source_accuracy(reference, ratios), source_accuracy(candidate, ratios)
    drop, allowed = ref_acc - cand_acc, source_drop_allowed(candidate, max_source_drop)
    checks.update(source_val_accuracy=cand_acc, source_only_val_accuracy=ref_acc, source_drop_allowed=allowed,
                  source_accuracy_class_weighted=ratios is not None)
    if drop > allowed:
        keep = False
        what = "class-weighted source-validation accuracy" if ratios is not None else "source-validation accuracy"
        reasons.append(f"{candidate.label} lost source knowledge: {what} "
                       f"{cand_acc:.3f} against {ref_acc:.3f} for source-only "
                       f"(a drop of {100 * drop:.1f} points, more than the {100 * allowed:.3g} allowed)")
    # 2. collapse onto few classes; with class weights, agreement with the estimate they came from
    predicted = candidate.target_proportions
    expected = expected_shares(reference, estimate)
    gone = vanished_classes(predicted, reference, estimate)
    checks.update(predicted_target_proportions=predicted.tolist(), expected_target_shares=expected.tolist(),
                  vanished_classes=gone)
    if gone:
        keep = False
        reasons.append(f"{candidate.label} predicts target class proportions {_fmt(predicted)}: classes {gone} all "
                       f"but vanished against expected shares {_fmt(expected)}, a collapse the label-shift estimate "
                       "does not support (the alignment likely pulled target points onto few classes)")
    tv = None
    if candidate.class_weighted and estimate is not None:
        target = np.asarray(estimate.target_proportions)
        slack = float(np.max(np.asarray(estimate.interval_high) - np.asarray(estimate.interval_low)) / 2)
        tv = float(0.5 * np.abs(predicted - target).sum())
        checks.update(proportions_tv=tv, proportions_tv_allowed=max_tv + slack)
        if tv > max_tv + slack:
            keep = False
            reasons.append(f"{candidate.label} was weighted by the estimated target proportions "
                           f"{_fmt(target)} but predicts {_fmt(predicted)} (total variation {tv:.2f} > "
                           f"{max_tv + slack:.2f}): the weighted alignment did not reach what it aimed at")
    # 3. label shift without class weights
    shifted = bool(estimate is not None and estimate.shifted)
    suspected = suspected_label_shift(reference, estimate)
    checks.update(label_shift_detected=shifted, label_shift_suspected_tv=suspected)
    if shifted and not candidate.class_weighted:
        keep = False
        reasons.append(f"label shift detected (estimated target proportions {_fmt(estimate.target_proportions)} "
                       f"against source {_fmt(estimate.source_proportions)}), and {candidate.label} aligns without "
                       "class weights: marginal alignment then maps target points to the wrong classes")
    elif suspected is not None and not candidate.class_weighted:
        keep = False
        why = f" ({no_estimate_because.rstrip('.')})" if no_estimate_because else ""
        reasons.append(f"label shift likely: no label-shift estimate could be made{why}, and the source-only model "
                       f"predicts target class proportions {_fmt(reference.target_proportions)} against source "
                       f"{_fmt(reference.source_proportions)} (total variation {suspected:.2f} > {SUSPECT_TV:g}); "
                       f"{candidate.label} aligns without class weights, and marginal alignment then maps target "
                       "points to the wrong classes")
    # 4. votes of the scores, with a paired bootstrap over the same rows
    rng = np.random.default_rng(seed)
    nv, nt = len(reference.source_correct), len(reference.target_probs)
    every_v, every_t = np.arange(nv), np.arange(nt)
    votes: Dict[str, int] = {}
    for s in scores:
        diff = _score_on(candidate, s, every_v, every_t) - _score_on(reference, s, every_v, every_t)
        boot = []
        for _ in range(n_bootstrap):
            iv, it = rng.integers(0, nv, nv), rng.integers(0, nt, nt)
            boot.append(_score_on(candidate, s, iv, it) - _score_on(reference, s, iv, it))
        sd = float(np.std(boot, ddof=1)) if len(boot) > 1 else 0.0
        votes[s] = int(diff > z * sd) - int(diff < -z * sd)
        checks[f"{s}_difference"], checks[f"{s}_bootstrap_sd"] = diff, sd
    checks["votes"] = votes
    pro, con = sum(v > 0 for v in votes.values()), sum(v < 0 for v in votes.values())
    if pro <= con:
        keep = False
        reasons.append(f"the label-free scores do not favour {candidate.label} over source-only ({pro} for, {con} "
                       f"against, {len(votes) - pro - con} within their bootstrap spread)")
    if keep:
        reasons.append(f"{candidate.label} kept: source-validation accuracy held ({cand_acc:.3f} vs "
                       f"{ref_acc:.3f}), no class of the target vanished from its predictions, "
                       f"and {pro} of {len(votes)} scores favour it ({con} against)")
    return Verdict(keep, reasons, checks)
