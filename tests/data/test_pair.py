import dataclasses
import re

import numpy as np
import pytest
import torch

from adaptkit import DomainPair, fit
from adaptkit.data.pair import TrainingData
from tests.conftest import moons_pair


def test_splits_are_disjoint_stratified_and_cover_everything():
    rng = np.random.default_rng(0)
    xs = rng.normal(size=(100, 3)); ys = np.repeat([0, 1, 2, 3], 25)
    xs[:, 0] = np.arange(100)  # a unique id per row to trace the split
    xt = rng.normal(size=(50, 3)); xt[:, 0] = 1000 + np.arange(50)
    pair = DomainPair(xs, ys, xt, np.arange(50) % 4, source_val_fraction=0.2, target_test_fraction=0.3)
    tr, va = pair.source_train.x[:, 0].numpy(), pair.source_val.x[:, 0].numpy()
    assert sorted(np.r_[tr, va]) == list(range(100)) and not set(tr) & set(va)
    # stratified: 20% of each class of 25 → 5 per class (common practice: sklearn's stratified splitting)
    assert np.bincount(pair.source_val.y.numpy()).tolist() == [5, 5, 5, 5]
    tt, te = pair.target_train_x[:, 0].numpy(), pair.target_test_x[:, 0].numpy()
    assert sorted(np.r_[tt, te]) == list(range(1000, 1050)) and len(te) == 15


def test_training_data_has_no_field_for_target_labels():
    names = {f.name for f in dataclasses.fields(TrainingData)}
    assert names == {"source_x", "source_y", "target_x", "source_w"}
    pair = moons_pair(n=60)
    assert pair.has_target_labels and "target_test" in pair.scoring_sets()


def test_target_labels_cannot_reach_training():
    # If any target label leaked into training, scrambling them would change the trained weights.
    base = moons_pair(n=80)
    rng = np.random.default_rng(1)
    from sklearn.datasets import make_moons

    xs, ys = make_moons(80, noise=0.1, random_state=0)
    def weights(target_y):
        pair = DomainPair(xs, ys, base.target_train_x.numpy(), target_y)
        run = fit(pair, method="source_only", steps=30, batch_size=16, progress=False, device="cpu")
        return [p.detach().clone() for p in run.model.parameters()]
    n = base.target_train_x.shape[0]
    a = weights(np.zeros(n, int))
    b = weights(rng.integers(0, 2, n))
    assert all(torch.equal(p, q) for p, q in zip(a, b))


@pytest.mark.parametrize("kwargs, err, msg", [
    (dict(source_x=np.zeros((4, 2)), source_y=[0, 1, 0, 1], target_x=np.zeros((3, 5))), ValueError,
     "source and target inputs must have the same shape per sample; got source (2,) and target (5,)"),
    (dict(source_x=np.zeros((4, 2)), source_y=[0.5, 1, 0, 1], target_x=np.zeros((3, 2))), ValueError,
     "source_y must hold integer class labels 0..K-1; got non-integer values"),
    (dict(source_x=np.zeros((4, 2)), source_y=[0, 2, 0, 2], target_x=np.zeros((3, 2))), ValueError,
     "class(es) [1] are missing from the source"),
    (dict(source_x=np.array([[0, np.nan]] * 4), source_y=[0, 1, 0, 1], target_x=np.zeros((3, 2))), ValueError,
     "source_x contains 4 NaN or infinite value(s)"),
    (dict(source_x=np.zeros((4, 2)), source_y=[0, 1, 0, 1], target_x=np.zeros((0, 2))), ValueError,
     "target_x is empty (0 samples)"),
    (dict(source_x=np.zeros((4, 2)), source_y=[0, 1, 0, 1], target_x=np.zeros((3, 2)), target_y=[0, 5, 1]),
     ValueError, "target_y holds labels [5] that the source does not have; accepted are 0..1 and -1 (unknown)"),
    (dict(source_x=np.zeros((4, 2)), source_y=[0, 1, 0], target_x=np.zeros((3, 2))), ValueError,
     "source_y has 3 labels for 4 samples"),
    (dict(source_x=np.zeros(4), source_y=[0, 1, 0, 1], target_x=np.zeros((3, 2))), ValueError,
     "source_x must have shape (n_samples, n_features, ...); got shape (4,)"),
    (dict(source_x=np.array([["a", "b"]] * 4), source_y=[0, 1, 0, 1], target_x=np.zeros((3, 2))), TypeError,
     "source_x must be numeric"),
    (dict(source_x=np.zeros((4, 2)), source_y=[0, -1, 0, 1], target_x=np.zeros((3, 2))), ValueError,
     "got 1 negative label(s)"),
])
def test_bad_input_names_the_problem(kwargs, err, msg):
    with pytest.raises(err, match=re.escape(msg)):
        DomainPair(**kwargs)


def test_bad_fraction_names_the_range():
    with pytest.raises(ValueError, match=re.escape("The 'source_val_fraction' parameter of DomainPair must be in the "
                                                   "range [0, 1). Got 1.5 instead.")):
        DomainPair(np.zeros((4, 2)), [0, 1, 0, 1], np.zeros((3, 2)), source_val_fraction=1.5)


def test_oracle_needs_target_labels():
    pair = DomainPair(np.zeros((4, 2)), [0, 1, 0, 1], np.zeros((3, 2)))
    with pytest.raises(ValueError, match="needs target labels"):
        pair.oracle_training_data()
    assert "target_test" not in pair.scoring_sets()  # no labels: nothing to score the target with
