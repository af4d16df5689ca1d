"""Every run summary carries a label-shift estimate made from a model trained on the source alone."""
import numpy as np
import pytest

from adaptkit import fit


@pytest.mark.parametrize("method", ["source_only", "coral"])
def test_every_summary_has_the_estimate_and_says_what_it_came_from(method):
    # scikit-learn's bundled breast-cancer table split by tumour size (selection on 'mean radius'): the malignant
    # share differs a lot between the domains; the estimate must see it whether or not the run aligns
    run = fit("selection_bias", method=method, steps=60, progress=False, device="cpu",
              data_options={"dataset": "breast_cancer", "feature": "mean radius", "strength": 3.0})
    est = run.summary["label_shift"]
    y = run.data.scoring_sets()["target_test"].y.numpy()
    true = np.bincount(y, minlength=2) / len(y)  # the held-out target labels, for checking only
    assert est["shifted"] and est["reliable"]
    np.testing.assert_allclose(est["target_proportions"], true, atol=0.08)
    assert est["estimated_from"] == ("this run's source-only model" if method == "source_only" else
                                     "a logistic regression on the source inputs (reference black box)")


def test_too_little_source_validation_is_said_not_raised():
    from adaptkit import DomainPair

    rng = np.random.default_rng(0)
    pair = DomainPair(rng.normal(size=(30, 2)), np.r_[np.zeros(27, int), np.ones(3, int)], rng.normal(size=(20, 2)))
    run = fit(pair, steps=5, progress=False, device="cpu")
    assert "labelled source-validation sample" in run.summary["label_shift"]["error"]
