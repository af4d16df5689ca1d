"""Tests of the bundled toy shifts (adaptkit.data.shifts).

Each check names the outside source it is checked against in a comment: scikit-learn's own generators and bundled
datasets, numpy/scipy geometry, or the papers the shifts cite.
"""
import dataclasses
import doctest
import inspect
import re
from pathlib import Path

import numpy as np
import pytest
import torch
from scipy.spatial.distance import pdist
from sklearn.datasets import load_digits, load_wine, make_moons
from sklearn.linear_model import LogisticRegression
from sklearn.preprocessing import StandardScaler

import adaptkit
from adaptkit.data import SHIFTS, DomainPair, make_shift, rotated_moons, selection_bias, shifted_blobs
from adaptkit.data import corrupted_digits
from adaptkit.data import shifts as shifts_module

# the toys; the readers of the user's files: tests/data/test_table.py, test_folders.py, test_digit_files.py
NAMES = [n for n in SHIFTS.names() if n not in shifts_module.READERS]


# -- helpers --------------------------------------------------------------------------------------------------------
def all_tensors(pair: DomainPair):
    sets = pair.scoring_sets()
    return [pair.source_train.x, pair.source_train.y, pair.source_val.x, pair.source_val.y,
            pair.target_train_x, pair.target_test_x, sets["target_test"].x, sets["target_test"].y]


def source_x(pair):  # every source input, train then validation
    return torch.cat([pair.source_train.x, pair.source_val.x]).numpy()


def target_x(pair):  # every target input, train then test
    return torch.cat([pair.target_train_x, pair.target_test_x]).numpy()


def sort_rows(a):
    a = a.reshape(len(a), -1)
    return a[np.lexsort(a.T[::-1])]


def lr_gap(pair):
    """(source-validation accuracy, target-test accuracy) of a scikit-learn logistic regression on the source."""
    flat = lambda t: t.reshape(len(t), -1).numpy()  # noqa: E731
    sets = pair.scoring_sets()
    lr = LogisticRegression(max_iter=2000).fit(flat(pair.source_train.x), pair.source_train.y.numpy())
    return (lr.score(flat(sets["source_val"].x), sets["source_val"].y.numpy()),
            lr.score(flat(sets["target_test"].x), sets["target_test"].y.numpy()))


# -- contract over every registered shift ---------------------------------------------------------------------------
@pytest.mark.parametrize("name", NAMES, ids=NAMES)
def test_same_seed_bit_identical_different_seed_differs(name):
    a, b, c = make_shift(name, seed=3), make_shift(name, seed=3), make_shift(name, seed=4)
    assert all(torch.equal(u, v) for u, v in zip(all_tensors(a), all_tensors(b)))
    assert not np.array_equal(target_x(a), target_x(c))
    assert not np.array_equal(source_x(a), source_x(c))


@pytest.mark.parametrize("name", NAMES, ids=NAMES)
def test_pair_named_after_registry_with_target_labels_for_scoring(name):
    pair = make_shift(name)
    assert pair.name == name and pair.has_target_labels
    assert not any("target_y" in f.name for f in dataclasses.fields(pair.training_data()))  # loop never sees them
    assert pair.source_train.x.dtype == torch.float32


@pytest.mark.parametrize("name", NAMES, ids=NAMES)
def test_data_config_lists_every_parameter_with_its_default(name):
    # Hydra config group `data`: `data=<name>` holds `name` plus each keyword parameter with the function's own
    # default, read from its signature (seed: null, i.e. the run's seed, unless set)
    from omegaconf import OmegaConf

    from adaptkit.config import compose

    cfg = OmegaConf.to_container(compose([f"data={name}"]).data)
    assert cfg.pop("name") == name
    params = inspect.signature(SHIFTS.get(name)).parameters
    assert cfg == {k: (None if k == "seed" else p.default) for k, p in params.items()}


def test_docstring_examples_run():
    assert doctest.testmod(shifts_module).failed == 0


# -- errors ---------------------------------------------------------------------------------------------------------
def test_unknown_shift_lists_the_registered_ones():
    with pytest.raises(ValueError, match=re.escape("Unknown shift 'moons'. Available shifts: corrupted_digits, "
                                                   "image_folders, mnist_usps, rotated_moons, selection_bias, "
                                                   "shifted_blobs, svhn_mnist, table, usps_mnist.")):
        make_shift("moons")


def test_unknown_parameter_names_shift_parameter_and_accepted_ones():
    with pytest.raises(ValueError, match=re.escape(
            "Unknown parameter 'angel' for shift 'rotated_moons'. "
            "Accepted parameters: seed, n_source, n_target, angle, noise.")):
        make_shift("rotated_moons", angel=40)


def test_bad_values_name_the_parameter():
    with pytest.raises(ValueError, match=re.escape("The 'contrast' parameter of shift 'corrupted_digits' must be "
                                                   "in the range [0, 1). Got 1.0 instead.")):
        make_shift("corrupted_digits", contrast=1.0)
    with pytest.raises(ValueError, match=re.escape("The 'feature' parameter of shift 'selection_bias' must be one of "
                                                   "{'alcohol', 'malic_acid'")):
        make_shift("selection_bias", feature="colour")


# -- rotated_moons ---------------------------------------------------------------------------------------------------
def test_moons_source_is_drawn_from_make_moons():
    # Outside source: sklearn.datasets.make_moons. Without noise its points are a fixed set (shuffled), so the
    # source must be exactly that set, with make_moons' labels (0 = upper moon).
    pair = rotated_moons(seed=5, n_source=120, noise=0.0)
    ref_x, ref_y = make_moons(120, noise=0.0, shuffle=False)
    got = np.column_stack([source_x(pair), torch.cat([pair.source_train.y, pair.source_val.y]).numpy()])
    ref = np.column_stack([ref_x.astype(np.float32), ref_y])
    np.testing.assert_array_equal(sort_rows(got), sort_rows(ref))


def test_moons_target_is_the_rotation_by_the_stated_angle():
    angle, centre = 40.0, np.array([0.5, 0.25])  # centre of the noise-free make_moons arcs
    flat = rotated_moons(seed=7, angle=0.0)
    turned = rotated_moons(seed=7, angle=angle)
    # the source does not depend on the angle
    np.testing.assert_array_equal(source_x(flat), source_x(turned))
    p0, p1 = target_x(flat).astype(np.float64), target_x(turned).astype(np.float64)
    # numpy: an explicit counter-clockwise rotation matrix about the centre
    t = np.deg2rad(angle)
    r = np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])
    np.testing.assert_allclose(p1, (p0 - centre) @ r.T + centre, atol=1e-5)
    # scipy: a rotation preserves all pairwise distances
    np.testing.assert_allclose(pdist(p1), pdist(p0), atol=1e-5)
    # numpy: every point turned by the stated angle about the centre, so the mean turn is 40°
    a0 = np.arctan2(*(p0 - centre).T[::-1])
    a1 = np.arctan2(*(p1 - centre).T[::-1])
    turn = np.rad2deg(np.angle(np.exp(1j * (a1 - a0))))
    assert abs(turn.mean() - angle) < 1e-3 and np.abs(turn - angle).max() < 1e-2


def test_moons_defaults_follow_ganin_counts():
    # Ganin et al., JMLR 2016, §5.1.1: 150 + 150 source points and 300 target points (the paper rotates by 35°).
    pair = rotated_moons()
    assert len(source_x(pair)) == 300 and len(target_x(pair)) == 300
    ys = torch.cat([pair.source_train.y, pair.source_val.y])
    assert torch.bincount(ys).tolist() == [150, 150]


# -- corrupted_digits ------------------------------------------------------------------------------------------------
def digit_indices(images):
    """Index into sklearn's load_digits of each (N, 1, 8, 8) image scaled by 1/16 (the 1797 images are distinct)."""
    ref = load_digits().images
    lookup = {img.astype(np.float32).tobytes(): i for i, img in enumerate(ref / 16.0)}
    return np.array([lookup[img[0].tobytes()] for img in images])


CLEAN = dict(contrast=0.0, noise=0.0, max_shift=0)


def test_digits_source_and_target_are_disjoint_halves_of_load_digits():
    # Outside source: sklearn.datasets.load_digits (Alpaydin & Kaynak, UCI optical digits).
    digits = load_digits()
    pair = corrupted_digits(seed=2, **CLEAN)
    assert pair.input_shape == (1, 8, 8) and pair.n_classes == 10
    src, tgt = digit_indices(source_x(pair)), digit_indices(target_x(pair))  # KeyError if an image is not there
    assert not set(src) & set(tgt)
    assert sorted(np.concatenate([src, tgt]).tolist()) == list(range(len(digits.images)))
    # stratified halves: per class the counts differ by at most one
    assert np.abs(np.bincount(digits.target[src]) - np.bincount(digits.target[tgt])).max() <= 1
    # the clean source equals load_digits images / 16, with load_digits' labels
    np.testing.assert_array_equal(source_x(pair)[:, 0], (digits.images[src] / 16.0).astype(np.float32))
    ys = torch.cat([pair.source_train.y, pair.source_val.y]).numpy()
    np.testing.assert_array_equal(ys, digits.target[src])


def test_digits_corruptions_change_only_the_target():
    clean, corrupt = corrupted_digits(seed=1, **CLEAN), corrupted_digits(seed=1)
    np.testing.assert_array_equal(source_x(clean), source_x(corrupt))
    assert not np.array_equal(target_x(clean), target_x(corrupt))


def test_digits_each_corruption_does_what_it_says():
    clean = target_x(corrupted_digits(seed=0, **CLEAN))[:, 0].astype(np.float64)
    # contrast: x <- m + (1 - c)(x - m) keeps each image's mean and scales its spread by 1 - c (numpy)
    low = target_x(corrupted_digits(seed=0, contrast=0.6, noise=0.0, max_shift=0))[:, 0]
    np.testing.assert_allclose(low.mean(axis=(1, 2)), clean.mean(axis=(1, 2)), atol=1e-5)
    np.testing.assert_allclose(low.std(axis=(1, 2)), 0.4 * clean.std(axis=(1, 2)), atol=1e-5)
    # noise: the residual has the stated standard deviation and no bias (numpy)
    noisy = target_x(corrupted_digits(seed=0, contrast=0.0, noise=0.2, max_shift=0))[:, 0]
    resid = noisy - clean
    assert abs(resid.std() - 0.2) < 0.005 and abs(resid.mean()) < 0.005
    # translation: each image is its clean self moved by at most one pixel per axis, zero-filled (numpy.pad)
    moved = target_x(corrupted_digits(seed=0, contrast=0.0, noise=0.0, max_shift=1))[:, 0]
    padded = np.pad(clean, ((0, 0), (1, 1), (1, 1)))
    candidates = np.stack([padded[:, 1 - dy:9 - dy, 1 - dx:9 - dx] for dy in (-1, 0, 1) for dx in (-1, 0, 1)])
    assert np.all(np.any(np.all(np.abs(candidates - moved) < 1e-6, axis=(2, 3)), axis=0))
    assert not np.array_equal(moved, clean.astype(np.float32))


# -- selection_bias --------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("strength", [2.0, -2.0])
def test_selection_moves_the_source_mean_in_the_selected_direction(strength):
    # Shimodaira (2000) / Zadrozny (ICML 2004): p(select | x) = sigmoid(strength * z) over-represents large z in the
    # source when strength > 0. The full standardised data has mean 0 (sklearn StandardScaler).
    for seed in range(3):
        pair = selection_bias(seed=seed, strength=strength)  # wine, feature 'alcohol' = column 0
        assert np.sign(strength) * source_x(pair)[:, 0].mean() > 0.3
        assert np.sign(strength) * target_x(pair)[:, 0].mean() < -0.3


def test_selection_domains_partition_the_bundled_dataset():
    # Outside source: sklearn.datasets.load_wine standardised by sklearn's StandardScaler.
    wine = load_wine()
    ref = StandardScaler().fit_transform(wine.data)
    pair = selection_bias(seed=4)
    rows = np.concatenate([source_x(pair), target_x(pair)]).astype(np.float64)
    dist = np.abs(rows[:, None, :] - ref[None, :, :]).max(axis=2)  # (rows, 178)
    match = dist.argmin(axis=1)
    assert dist.min(axis=1).max() < 1e-5  # every row is a row of the dataset ...
    assert sorted(match.tolist()) == list(range(len(ref)))  # ... each used exactly once: source ∪ target = all
    ys = torch.cat([pair.source_train.y, pair.source_val.y]).numpy()
    np.testing.assert_array_equal(ys, wine.target[match[:len(ys)]])


def test_zero_strength_is_an_unbiased_split():
    pair = selection_bias(seed=0, dataset="breast_cancer", strength=0.0)
    assert abs(source_x(pair).mean(axis=0)).max() < 0.35  # no feature singled out
    assert 200 < len(source_x(pair)) < 370  # Binomial(569, 1/2)


# -- the shifts are real: a source-trained logistic regression (scikit-learn) loses accuracy on the target ------------
def test_rotated_moons_hurts_a_source_only_classifier():
    src_acc, tgt_acc = lr_gap(rotated_moons(seed=0, angle=40, n_source=1000, n_target=1000))
    assert src_acc > 0.8 and src_acc - tgt_acc > 0.08  # measured about 0.89 vs 0.69 over seeds 0..4


def test_shifted_blobs_hurts_a_source_only_classifier_but_stays_learnable():
    pair = shifted_blobs(seed=0)
    src_acc, tgt_acc = lr_gap(pair)
    assert src_acc > 0.9 and src_acc - tgt_acc > 0.1  # measured about 0.99 vs 0.75 over seeds 0..9
    oracle = pair.oracle_training_data()
    sets = pair.scoring_sets()
    lr = LogisticRegression(max_iter=2000).fit(oracle.source_x.numpy(), oracle.source_y.numpy())
    assert lr.score(sets["target_test"].x.numpy(), sets["target_test"].y.numpy()) > 0.9
