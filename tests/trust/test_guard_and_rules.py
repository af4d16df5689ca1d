"""The guard and the selection rules on hand-built evidence (adaptkit/trust/guard.py, rules.py)."""
import numpy as np
import pytest

from adaptkit.trust.guard import Evidence, judge_candidate
from adaptkit.trust.label_shift import LabelShiftEstimate
from adaptkit.trust.rules import choose


def _evidence(label, acc=0.95, loss=0.3, target_probs=None, n=200, weighted=False, seed=0):
    rng = np.random.default_rng(seed)
    correct = (np.arange(n) < acc * n).astype(float)
    losses = np.abs(rng.normal(loss, 0.05, n))
    weights = np.exp(rng.normal(0, 0.3, n))
    if target_probs is None:  # balanced, moderately confident predictions on two classes
        p = rng.uniform(0.6, 0.9, 2 * n)
        cls = np.arange(2 * n) % 2
        target_probs = np.where(cls[:, None] == 0, np.c_[p, 1 - p], np.c_[1 - p, p])
    return Evidence(label, correct, losses, weights, np.asarray(target_probs), weighted)


def _estimate(target, shifted):
    return LabelShiftEstimate("bbse", [0.5, 0.5], list(target), [t / 0.5 for t in target],
                              [t - 0.03 for t in target], [t + 0.03 for t in target], 0.5 * sum(abs(t - 0.5) for t in target),
                              shifted, True, 0.01, 0.5, [])


def test_a_collapse_onto_one_class_is_rejected_with_its_reason():
    ref = _evidence("source_only")
    collapsed = _evidence("dann weight 1", loss=0.2, target_probs=np.tile([0.97, 0.03], (400, 1)))
    v = judge_candidate(ref, collapsed, _estimate([0.5, 0.5], False), n_bootstrap=50)
    assert not v.keep
    assert any("does not support" in r and "[0.97, 0.03]" in r for r in v.reasons)
    assert v.checks["vanished_classes"] == [1]  # predicted at 3% against an expected half


def test_a_candidate_the_evidence_favours_is_kept():
    ref = _evidence("source_only", loss=0.4, seed=1)
    # same source accuracy, lower source losses (so lower IWCV and DEV risks), more confident balanced predictions
    p = np.r_[np.tile([0.95, 0.05], (200, 1)), np.tile([0.05, 0.95], (200, 1))]
    better = _evidence("coral weight 3", loss=0.2, target_probs=p, seed=1)
    v = judge_candidate(ref, better, _estimate([0.5, 0.5], False), n_bootstrap=100)
    assert v.keep, v.reasons
    assert v.checks["votes"] == {"info_max": 1}  # the default voter (VOTING_SCORES)
    every = judge_candidate(ref, better, _estimate([0.5, 0.5], False), n_bootstrap=100, z=1.0,
                            scores=("info_max", "iwcv", "dev"))
    assert every.checks["votes"] == {"info_max": 1, "iwcv": 1, "dev": 1}  # lower source losses: lower risks
    assert "kept" in v.reasons[-1]


def test_lost_source_knowledge_is_rejected():
    ref = _evidence("source_only", acc=0.95)
    worse = _evidence("adr weight 1", acc=0.85, loss=0.2)
    v = judge_candidate(ref, worse, None, n_bootstrap=20)
    assert not v.keep and "lost source knowledge" in v.reasons[0] and "10.0 points" in v.reasons[0]


def test_a_rare_class_the_estimate_supports_is_no_collapse():
    # a reliable estimate that says class 1 is rare on the target: predicting it rarely is no collapse
    ref = _evidence("source_only", loss=0.4)
    p = np.r_[np.tile([0.95, 0.05], (390, 1)), np.tile([0.1, 0.9], (10, 1))]
    v = judge_candidate(ref, _evidence("mmd weighted", loss=0.2, target_probs=p, weighted=True),
                        _estimate([0.97, 0.03], True), n_bootstrap=50)
    assert v.checks["vanished_classes"] == [] and v.checks["proportions_tv"] < 0.05


def test_a_weighted_candidate_must_reach_the_proportions_it_was_weighted_by():
    ref = _evidence("source_only", loss=0.4)
    v = judge_candidate(ref, _evidence("dann weighted", loss=0.2, weighted=True), _estimate([0.8, 0.2], True),
                        n_bootstrap=50)
    assert not v.keep and any("did not reach what it aimed at" in r for r in v.reasons)


def test_label_shift_needs_class_weights():
    p = np.r_[np.tile([0.9, 0.1], (300, 1)), np.tile([0.1, 0.9], (100, 1))]  # 75 / 25 predicted
    ref = _evidence("source_only", loss=0.4, target_probs=np.r_[np.tile([0.7, 0.3], (300, 1)),
                                                                np.tile([0.3, 0.7], (100, 1))])
    est = _estimate([0.75, 0.25], True)
    unweighted = judge_candidate(ref, _evidence("mmd", loss=0.2, target_probs=p), est, n_bootstrap=50)
    assert not unweighted.keep and any("aligns without class weights" in r for r in unweighted.reasons)
    weighted = judge_candidate(ref, _evidence("mmd weighted", loss=0.2, target_probs=p, weighted=True), est,
                               n_bootstrap=50)
    assert weighted.keep, weighted.reasons


def test_without_an_estimate_a_large_predicted_shift_needs_class_weights():
    # No estimate could be made (estimate=None, e.g. 2 source-validation rows of a class). Source shares 75/25 (the
    # validation labels); the source-only model predicts 25/75 on the target by argmax, mean probabilities
    # (100·0.8 + 300·0.2) / 400 = 0.35 for class 0: total variation 0.40
    # by hand, above SUSPECT_TV (0.35), so an unweighted alignment is refused although information maximisation
    # favours it.
    from adaptkit.trust.guard import SUSPECT_TV, suspected_label_shift

    labels = np.r_[np.zeros(150, int), np.ones(50, int)]
    flipped = np.r_[np.tile([0.8, 0.2], (100, 1)), np.tile([0.2, 0.8], (300, 1))]  # predicted 25/75
    ref = _evidence("source_only", loss=0.4, target_probs=flipped)
    ref.source_labels = labels
    assert suspected_label_shift(ref) == pytest.approx(0.40) and SUSPECT_TV == 0.35
    assert suspected_label_shift(ref, threshold=0.45) is None
    sharp = np.r_[np.tile([0.95, 0.05], (100, 1)), np.tile([0.05, 0.95], (300, 1))]
    cand = _evidence("dann weight 1", loss=0.2, target_probs=sharp)
    v = judge_candidate(ref, cand, None, n_bootstrap=50, no_estimate_because="class 1 has 2 rows.")
    assert v.checks["votes"] == {"info_max": 1}  # the score alone would keep it
    assert any("could be made (class 1 has 2 rows), and" in r for r in v.reasons)
    assert not v.keep and any(r.startswith("label shift likely") and "0.40 > 0.35" in r for r in v.reasons)
    assert judge_candidate(ref, _evidence("dann weighted", loss=0.2, target_probs=sharp, weighted=True), None,
                           n_bootstrap=50).checks["label_shift_suspected_tv"] == pytest.approx(0.40)
    # the source's proportions predicted (75/25 by argmax, mean 0.65 for class 0: total variation 0.10): no
    # suspicion, and the candidate is kept
    ref.target_probs = flipped[:, ::-1]
    kept = judge_candidate(ref, _evidence("dann weight 1", loss=0.2, target_probs=sharp[:, ::-1]), None,
                           n_bootstrap=50)
    assert kept.checks["label_shift_suspected_tv"] is None and kept.keep, kept.reasons
    # with an estimate, the estimate decides (here: no shift detected), not the source-only model's counts
    ref.target_probs = flipped
    assert suspected_label_shift(ref, _estimate([0.5, 0.5], False)) is None


def test_no_evidence_either_way_keeps_source_only():
    ref = _evidence("source_only", seed=3)
    same = _evidence("coral weight 0.1", seed=3)
    v = judge_candidate(ref, same, None, n_bootstrap=50)
    assert not v.keep and "do not favour" in v.reasons[-1]


def test_rules_pick_by_score_direction_and_veto():
    cands = [{"source_val_accuracy": 0.95, "info_max": 0.3, "dev": 0.5, "iwcv": 0.5, "target_entropy": 0.4},
             {"source_val_accuracy": 0.70, "info_max": 0.6, "dev": 0.2, "iwcv": 0.2, "target_entropy": 0.1},
             {"source_val_accuracy": 0.94, "info_max": 0.5, "dev": 0.3, "iwcv": 0.6, "target_entropy": 0.3}]
    assert choose(cands, "info_max") == 1 and choose(cands, "dev") == 1  # dev: lower is better
    assert choose(cands, "target_entropy") == 1
    assert choose(cands, "vetoed_info_max") == 2  # candidate 1 lost 25 points of source accuracy
    # rank agreement over info_max, dev, iwcv, source accuracy among the unvetoed 0 and 2: 2 wins on info_max and
    # dev, 0 on iwcv and source accuracy -> a tie of mean ranks, broken towards the earlier candidate
    assert choose(cands, "rank_agreement") == 0
    assert choose([{"info_max": None}], "info_max") is None
    with pytest.raises(ValueError, match="The 'rule' parameter of choose must be one of"):
        choose(cands, "best")


def test_the_source_drop_allowance_counts_rows_and_class_weights():
    # 40 validation rows: one wrong row is 2.5 points, within the 3-row allowance (7.5 points) but not within 3 points
    ref, cand = _evidence("source_only", acc=1.0, n=40), _evidence("mmd", acc=0.95, n=40, loss=0.2)
    assert judge_candidate(ref, cand, None, n_bootstrap=20).checks["source_drop_allowed"] == pytest.approx(0.075)
    # class weights: the candidate's errors fall on class 1 (labels 0,1 alternate; rows 38, 39 wrong) and the
    # estimate says class 1 is 4x rarer on the target -> the weighted accuracy is the mean of correct weighted by
    # the ratios (numpy, by hand below)
    labels = np.arange(40) % 2
    ref = Evidence("source_only", np.ones(40), np.full(40, 0.3), np.ones(40), np.full((80, 2), 0.5), False,
                   np.full((40, 2), 0.5), labels)
    correct = np.ones(40)
    correct[[37, 39]] = 0  # two class-1 rows wrong
    cand = Evidence("mmd weighted", correct, np.full(40, 0.3), np.ones(40), np.full((80, 2), 0.5), True,
                    np.full((40, 2), 0.5), labels)
    est = _estimate([0.8, 0.2], True)
    v = judge_candidate(ref, cand, est, n_bootstrap=20)
    w = np.asarray(est.ratios)[labels]
    assert v.checks["source_val_accuracy"] == pytest.approx((w * correct).sum() / w.sum())
    assert v.checks["source_accuracy_class_weighted"] is True


def test_model_evidence_computes_every_score_a_rule_may_name():
    # every single score is a choose_by rule (rule_names), so the guard must compute each of them for its candidates
    import torch

    from adaptkit.nets import AdaptedModel, MLPEncoder, MLPHead
    from adaptkit.select import SCORES, ScoreInputs, compute_scores
    from adaptkit.trust.candidates import model_evidence
    from adaptkit.trust.rules import rule_names
    from tests.conftest import moons_pair

    pair = moons_pair(n=60)
    torch.manual_seed(0)
    model = AdaptedModel(MLPEncoder(pair.input_shape, hidden=[8], features=4), MLPHead(4, pair.n_classes, hidden=[8]),
                         4, pair.n_classes)
    _, scores = model_evidence("c", model, pair, "cpu")
    assert set(scores) == set(SCORES) and set(SCORES) <= set(rule_names())
    with torch.no_grad():  # the same numbers as compute_scores on the model's own outputs
        model.eval()
        fs, ft = model.features(pair.source_val.x, "source"), model.features(pair.target_train_x, "target")
        ps, pt = torch.softmax(model.head(fs), 1), torch.softmax(model.head(ft), 1)
    ref = compute_scores(ScoreInputs(fs.numpy(), ps.numpy(), pair.source_val.y.numpy(), ft.numpy(), pt.numpy()))
    assert scores["reverse_validation"] == pytest.approx(ref["reverse_validation"])
