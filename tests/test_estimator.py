import re
import warnings

import numpy as np
import pytest
from sklearn.base import clone
from sklearn.utils.estimator_checks import parametrize_with_checks

from adaptkit import AlignedClassifier

# Checks we do not pass, with the reason (scikit-learn's own mechanism for declaring them):
EXPECTED_FAILED = {
    "check_classifiers_classes":
        "-1 marks unlabelled target rows (scikit-learn's semi-supervised convention), so a class named -1 is read "
        "as 'unlabelled'; the check uses the labels {-1, 1}.",
    "check_methods_subset_invariance":
        "float32 matrix products differ in the last bit between batch sizes (BLAS blocking); differences ~1e-7.",
}


@parametrize_with_checks([AlignedClassifier(max_steps=150, random_state=0, device="cpu")],
                         expected_failed_checks=lambda est: EXPECTED_FAILED)
def test_scikit_learn_estimator_contract(estimator, check):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # "no unlabelled target rows" in the checks' data
        check_outcome = check(estimator)  # scikit-learn's checks raise AssertionError (or similar) on failure
    assert check_outcome is None


def _data(seed=0):
    from sklearn.datasets import make_blobs

    X, y = make_blobs(200, centers=[[0, 0], [3, 3]], random_state=seed)
    Xt = X[100:] + np.array([1.0, -0.5])  # a shifted copy of disjoint rows as the unlabelled target
    return np.r_[X[:100], Xt], np.r_[y[:100], -np.ones(100, int)]


def test_rows_with_minus_one_are_the_target_and_only_they():
    X, y = _data()
    clf = AlignedClassifier(method="source_only", max_steps=30, random_state=0, device="cpu").fit(X, y)
    np.testing.assert_array_equal(clf.run_.data.target_train_x.numpy(), X[100:].astype(np.float32))
    assert len(clf.run_.data.source_train) + len(clf.run_.data.source_val) == 100
    assert set(clf.classes_) == {0, 1}
    assert clf.predict(X).shape == (200,) and clf.transform(X).shape == (200, 32)
    assert np.allclose(clf.predict_proba(X).sum(1), 1, atol=1e-5)


def test_no_target_rows_trains_source_only_with_a_warning():
    X, y = _data()
    with pytest.warns(UserWarning, match=re.escape("y has no unlabelled target rows (y == -1): training source-only")):
        clf = AlignedClassifier(max_steps=10, random_state=0, device="cpu").fit(X[:100], y[:100])
    assert clf.run_.summary["method"] == "source_only"


def test_string_labels_and_clone_and_params():
    X, y = _data()
    ys = np.array([{0: "cat", 1: "dog", -1: -1}[v] for v in y], dtype=object)
    clf = AlignedClassifier(max_steps=20, random_state=1, device="cpu", method_options={})
    clf.fit(X, ys)
    assert set(clf.predict(X)) <= {"cat", "dog"}
    c2 = clone(clf).set_params(max_steps=5)
    assert c2.get_params()["max_steps"] == 5 and not hasattr(c2, "run_")


def test_same_random_state_same_predictions():
    X, y = _data()
    a = AlignedClassifier(max_steps=40, random_state=3, device="cpu").fit(X, y).predict_proba(X)
    b = AlignedClassifier(max_steps=40, random_state=3, device="cpu").fit(X, y).predict_proba(X)
    np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("X, y, msg", [
    (np.zeros((4, 2)), None, "requires y to be passed"),
    (np.zeros((4, 2)), np.array([-1, -1, -1, -1]), "every row as unlabelled target (-1)"),
    (np.zeros((4, 2)), np.array([0, 1, 0]), "X has 4 rows but y has 3"),
    (np.array([[0, np.nan]] * 4), np.array([0, 1, 0, -1]), "Input X contains NaN"),
    (np.zeros((4, 2)), np.array([0.5, 1.2, 0, -1]), "Unknown label type: 'continuous'"),
])
def test_bad_arrays_raise_value_error_naming_the_problem(X, y, msg):
    with pytest.raises(ValueError, match=re.escape(msg)):
        AlignedClassifier(max_steps=2, device="cpu").fit(X, y)
