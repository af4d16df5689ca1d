"""The guarded procedure (adaptkit.trust.candidates) end to end on small runs: a candidate whose training
diverges is dropped with its reason instead of ending the fit, and under a detected label shift the candidates
are weighted by class with ratios re-estimated during training."""
import warnings

import pytest

from adaptkit import fit
from adaptkit.data import make_shift


def test_a_diverging_candidate_is_dropped_and_the_fit_goes_on():
    # CORAL at 1e12 × its default weight overflows float32 within a few steps (its loss is inf: checked below by
    # the reason the guard records); the candidate at 1 × trains normally.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run = fit("rotated_moons", method="coral", weight="auto", weight_candidates=[1.0, 1e12], guard=True,
                  steps=20, batch_size=32, seed=0, progress=False, diagnostics=False)
    cands = run.summary["trust"]["candidates"]
    assert [c["weight"] for c in cands] == [3000.0, 3000.0 * 1e12]
    assert cands[1]["dropped"].startswith("training diverged"), cands[1]
    assert "non-finite" in cands[1]["dropped"]
    assert not cands[0].get("dropped") and cands[0].get("chosen") is True
    assert run.summary["decision"]


def test_every_candidate_diverging_falls_back_to_source_only_and_says_why():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run = fit("rotated_moons", method="coral", weight="auto", weight_candidates=[1e12, 1e13], guard=True,
                  steps=20, batch_size=32, seed=0, progress=False, diagnostics=False)
    trust = run.summary["trust"]
    assert trust["kept"] == "source_only"
    assert all(c["dropped"].startswith("training diverged") for c in trust["candidates"])
    assert run.summary["decision"].startswith("fell back to source-only: no candidate survived")


@pytest.mark.slow
def test_under_detected_label_shift_the_candidates_reestimate_class_weights():
    # scikit-learn's bundled breast-cancer table split by tumour radius: 9.5 % vs 79 % malignant (the trust
    # issue's reproduction); the source-only reference's BBSE estimate detects the shift.
    pair = make_shift("selection_bias", seed=0, dataset="breast_cancer", feature="mean radius", strength=3.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run = fit(pair, method="mmd", weight="auto", weight_candidates=[0.3, 1.0], guard=True, steps=120,
                  batch_size=32, seed=0, progress=False, diagnostics=False)
    trust = run.summary["trust"]
    assert trust["label_shift"]["shifted"] is True
    assert trust["class_weights"] == "reestimated"
    assert all(c["candidate"].endswith("with class weights") for c in trust["candidates"])


def test_the_estimator_passes_its_candidate_multiples_to_the_guarded_run():
    import numpy as np

    from adaptkit import AlignedClassifier
    from adaptkit.methods.mmd import MMD

    pair = make_shift("rotated_moons", seed=0)
    xs, ys, xt = pair.source_train.x.numpy(), pair.source_train.y.numpy(), pair.target_train_x.numpy()
    X, y = np.r_[xs, xt], np.r_[ys, -np.ones(len(xt), int)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        clf = AlignedClassifier(method="mmd", weight_candidates=[0.5, 2.0], max_steps=20, random_state=0,
                                device="cpu").fit(X, y)
    default = MMD.Options().weight  # the multiples apply to the method's own default weight
    assert [c["weight"] for c in clf.summary_["trust"]["candidates"]] == [0.5 * default, 2.0 * default]


def test_a_single_candidate_that_diverges_leaves_the_source_only_model():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run = fit("rotated_moons", method="coral", weight="auto", weight_candidates=[1e12], guard=True,
                  steps=20, batch_size=32, seed=0, progress=False, diagnostics=False)
    trust = run.summary["trust"]
    assert trust["screen_step"] is None  # one candidate: no screening, it trains to the end and diverges there
    assert trust["candidates"][0]["dropped"].startswith("training diverged (")
    assert trust["kept"] == "source_only" and run.summary["decision"].startswith("fell back to source-only")
