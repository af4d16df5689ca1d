"""Hostile input: whatever arrays arrive, AlignedClassifier and DomainPair either work correctly or raise a
ValueError/TypeError naming the problem — never another exception, never NaN predictions.

Property-based (hypothesis): random shapes, dtypes (ints, float16/32/64, bool, complex, object), NaN/inf, huge
values, empty arrays, 1-D X, wrong-length or odd y, unseen labels, non-contiguous and read-only arrays. The
contract follows scikit-learn's input validation (``check_array``: "Input contains NaN", "Complex data not
supported", "Found array with 0 sample(s)", "Expected 2D array, got 1D array instead") and its MLP, which raises a
ValueError when "Solver produced non-finite parameter weights. The input data may contain large values and need
to be preprocessed."
"""
from __future__ import annotations

import re
import warnings

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from adaptkit import AlignedClassifier, DomainPair

SETTINGS = dict(deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow,
                                                                         HealthCheck.data_too_large])
NUMERIC = [np.int8, np.int64, np.uint8, np.float16, np.float32, np.float64, np.bool_]
ODD = [np.complex64, np.complex128, object]


@st.composite
def sample_shape(draw):
    """The shape of one sample: () for 1-D X, mostly (d,), sometimes (d1, d2); a zero width now and then."""
    ndim = draw(st.sampled_from([1, 2, 2, 2, 3]))
    tail = tuple(draw(st.lists(st.integers(0, 3), min_size=ndim - 1, max_size=ndim - 1)))
    if draw(st.booleans()):
        tail = tuple(max(1, t) for t in tail)
    return tail


@st.composite
def any_array(draw, n: int, tail=None):
    """An array with ``n`` rows of any dtype, values and memory layout."""
    tail = draw(sample_shape()) if tail is None else tail
    dtype = draw(st.sampled_from(NUMERIC * 3 + ODD))
    shape = (n,) + tail
    if dtype is object:
        elems = st.one_of(st.floats(-5, 5), st.integers(-3, 3), st.text(max_size=2), st.none())
        a = draw(hnp.arrays(object, shape, elements=elems))
    elif np.dtype(dtype).kind == "f" and draw(st.booleans()):
        a = draw(hnp.arrays(dtype, shape, elements=st.floats(-10, 10, width=np.dtype(dtype).itemsize * 8)))
    else:  # the dtype's whole range: NaN, ±inf, ±max, subnormals
        a = draw(hnp.arrays(dtype, shape))
    layout = draw(st.sampled_from(["c", "fortran", "strided", "readonly"]))
    if layout == "fortran":
        a = np.asfortranarray(a)
    elif layout == "strided" and a.ndim >= 1:  # a non-contiguous view with the same shape
        big = np.repeat(a, 2, axis=-1) if a.ndim > 1 else np.repeat(a, 2)
        a = big[..., ::2]
    elif layout == "readonly":
        a = a.copy()
        a.flags.writeable = False
    return a


@st.composite
def class_labels(draw, n: int):
    """Valid DomainPair labels: every class 0..K-1 present (when n allows), any integer or float dtype."""
    k = draw(st.integers(1, max(1, min(n, 3))))
    y = draw(st.permutations(np.arange(n) % k))
    return np.array(y, dtype=draw(st.sampled_from([np.int64, np.int32, np.uint8, np.float32])))


@st.composite
def labels(draw, n: int):
    """y of length n (sometimes not), with -1 for target rows, in any label type."""
    length = draw(st.sampled_from([n] * 6 + [max(0, n - 1), n + 1]))
    kind = draw(st.sampled_from(["int", "int", "int", "str", "float", "bool", "object", "column"]))
    ints = draw(st.lists(st.sampled_from([-1, -1, 0, 1, 2, 7]), min_size=length, max_size=length))
    if kind == "int":
        return np.array(ints, dtype=np.int64)
    if kind == "column":
        return np.array(ints, dtype=np.int64).reshape(-1, 1)
    if kind == "str":
        return np.array([str(v) if v != 7 else "cat" for v in ints])
    if kind == "float":
        extra = draw(st.sampled_from([None, np.nan, np.inf, 0.5]))
        y = np.array(ints, dtype=np.float64)
        if extra is not None and length:
            y[draw(st.integers(0, length - 1))] = extra
        return y
    if kind == "bool":
        return np.array([v > 0 for v in ints])
    odd = draw(st.sampled_from(["cat", "cat", None, np.nan, 1.5]))
    return np.array([v if v != 7 else odd for v in ints], dtype=object)


def _named_error(e: Exception) -> None:
    assert isinstance(e, (ValueError, TypeError)), f"{type(e).__name__}: {e}"
    assert len(str(e)) >= 15, f"an unhelpful message: {e!r}"


def _check_fitted(clf, X) -> None:
    proba = clf.predict_proba(X)
    assert proba.shape == (X.shape[0], len(clf.classes_))
    assert np.all(np.isfinite(proba)) and np.allclose(proba.sum(1), 1, atol=1e-4)
    pred = clf.predict(X)
    assert pred.shape == (X.shape[0],) and set(pred.tolist()) <= set(clf.classes_.tolist())
    features = clf.transform(X)
    assert features.shape[0] == X.shape[0] and np.all(np.isfinite(features))


@settings(max_examples=150, **SETTINGS)
@given(data=st.data(), method=st.sampled_from(["source_only", "dann"]))
def test_aligned_classifier_works_or_names_the_problem(data, method):
    n = data.draw(st.one_of(st.integers(0, 9), st.integers(4, 9)), label="n")
    X = data.draw(any_array(n), label="X")
    y = data.draw(labels(n), label="y")
    clf = AlignedClassifier(method=method, max_steps=2, batch_size=4, random_state=0, device="cpu")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            clf.fit(X, y)
        except Exception as e:  # noqa: BLE001 - the property is about which exceptions may escape
            _named_error(e)
            event(f"fit refused: {type(e).__name__}: {str(e)[:40]}")
            return
        event("fit worked")
        # the training X itself (after a 2-step fit on huge values the network may overflow: a named error)
        _works_or_named_error(clf, np.asarray(X, dtype=np.float64))
        # other hostile arrays
        _works_or_named_error(clf, data.draw(any_array(data.draw(st.integers(0, 4))), label="X2"))
        # score with labels the classifier never saw: an accuracy in [0, 1], or a named error
        try:
            assert 0.0 <= clf.score(X, np.array(["never-seen"] * X.shape[0], dtype=object)) <= 1.0
        except AssertionError:
            raise
        except Exception as e:  # noqa: BLE001
            _named_error(e)


def _works_or_named_error(clf, X) -> None:
    try:
        _check_fitted(clf, X)
    except AssertionError:
        raise
    except Exception as e:  # noqa: BLE001
        _named_error(e)
        event(f"predict refused: {type(e).__name__}: {str(e)[:40]}")


@settings(max_examples=250, **SETTINGS)
@given(data=st.data())
def test_domain_pair_works_or_names_the_problem(data):
    ns, nt = data.draw(st.integers(0, 8), label="ns"), data.draw(st.integers(0, 8), label="nt")
    tail = data.draw(st.one_of(st.none(), st.builds(tuple, st.lists(st.integers(1, 3), min_size=1, max_size=2))))
    sx = data.draw(any_array(ns, tail), label="source_x")  # tail None: each domain its own (often bad) shape
    tx = data.draw(any_array(nt, tail), label="target_x")
    sy = data.draw(st.one_of(class_labels(ns), labels(ns)), label="source_y")
    ty = data.draw(st.one_of(st.none(), class_labels(nt), labels(nt)), label="target_y")
    if data.draw(st.booleans(), label="as torch tensors"):  # DomainPair also takes tensors
        sx, tx, sy = (torch.from_numpy(np.array(a)) if a.dtype != object and a.dtype.kind != "U" else a
                      for a in (sx, tx, sy))
    try:
        pair = DomainPair(sx, sy, tx, ty, source_val_fraction=data.draw(st.sampled_from([0.0, 0.2])))
    except Exception as e:  # noqa: BLE001
        _named_error(e)
        event(f"refused: {type(e).__name__}: {str(e)[:40]}")
        return
    event("constructed")
    d = pair.training_data()
    for t in (d.source_x, d.target_x):
        assert t.dtype.is_floating_point and bool(t.isfinite().all())
    assert d.source_x.shape[1:] == d.target_x.shape[1:] == pair.input_shape
    assert int(d.source_y.min()) >= 0 and int(d.source_y.max()) < pair.n_classes


# -- the cases the properties found, pinned with their messages ----------------------------------------------------
def _ok_X(n=12):
    rng = np.random.default_rng(0)
    return rng.normal(size=(n, 2))


def _ok_y(n=12):
    return np.r_[np.arange(n - 4) % 2, -np.ones(4, int)]


@pytest.mark.parametrize("X, y, err, msg", [
    (_ok_X() * 1e30, _ok_y(), ValueError, "Training produced non-finite values"),
    (_ok_X().astype(np.complex128), _ok_y(), ValueError, "Complex data not supported"),
    (np.array([["a", "b"]] * 12, dtype=object), _ok_y(), ValueError, "could not convert"),
    (_ok_X()[:, 0], _ok_y(), ValueError, "Expected 2D array, got 1D array instead"),
    (np.zeros((0, 2)), np.zeros(0, int), ValueError, "Found array with 0 sample(s)"),
    (np.zeros((12, 0)), _ok_y(), ValueError, "0 feature(s)"),
    (np.where(np.eye(12, 2) > 0, np.nan, 0.0), _ok_y(), ValueError, "Input X contains NaN"),
    (_ok_X(), _ok_y()[:-1], ValueError, "X has 12 rows but y has 11"),
    (_ok_X(), np.r_[np.arange(8) % 2, [np.nan], -np.ones(3)], ValueError, "y contains NaN or infinite values"),
    (_ok_X(), -np.ones(12, int), ValueError, "at least one labelled source row is needed"),
    (_ok_X(), np.array([0, "a", 1, "a"] * 2 + [-1] * 4, dtype=object), ValueError, "y mixes label types (int, str)"),
    (_ok_X(), np.array([0, None, 1, 0] * 2 + [-1] * 4, dtype=object), ValueError, "y mixes label types (NoneType, int)"),
    (_ok_X(), np.array([0, np.nan, 1, 0] * 2 + [-1] * 4, dtype=object), ValueError, "y contains NaN or infinite"),
    (_ok_X(), np.array([0.5, 1.5, 1, 0] * 2 + [-1] * 4), ValueError, "Unknown label type: 'continuous'"),
])
def test_pinned_bad_inputs_name_the_problem(X, y, err, msg):
    clf = AlignedClassifier(max_steps=2, batch_size=4, random_state=0, device="cpu")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(err, match=re.escape(msg)):
            clf.fit(X, y)


def test_float64_values_beyond_float32_are_refused_not_turned_into_inf():
    X = _ok_X()
    clf = AlignedClassifier(max_steps=2, batch_size=4, random_state=0, device="cpu").fit(X, _ok_y())
    with pytest.raises(ValueError, match=re.escape("X holds values too large for float32")):
        clf.predict(np.array([[1e300, 0.0]]))
    with pytest.raises(ValueError, match=re.escape("source_x holds values too large for float32")):
        DomainPair(np.array([[1e300, 0.0], [0.0, 1.0]]), [0, 1], np.zeros((2, 2)))


def test_read_only_and_non_contiguous_arrays_are_accepted_and_not_modified():
    X, y = _ok_X(16), _ok_y(16)
    Xf = np.asfortranarray(X)
    Xs = np.repeat(X, 2, axis=1)[:, ::2]
    Xr = X.copy()
    Xr.flags.writeable = False
    preds = []
    for A in (X, Xf, Xs, Xr):
        before = A.copy()
        clf = AlignedClassifier(max_steps=3, batch_size=4, random_state=0, device="cpu").fit(A, y)
        preds.append(clf.predict_proba(A))
        np.testing.assert_array_equal(A, before)
    for p in preds[1:]:
        np.testing.assert_array_equal(p, preds[0])


def test_predicting_samples_of_another_shape_is_refused_in_one_line():
    import adaptkit

    run = adaptkit.fit("corrupted_digits", method="source_only", encoder="small_cnn", steps=2, progress=False,
                       device="cpu")
    with pytest.raises(ValueError, match=re.escape("trained on samples of shape (1, 8, 8) (64 values); got an array "
                                                   "of shape (3, 3, 8, 8)")):
        run.predict(np.zeros((3, 3, 8, 8)))  # three channels for a grey-scale run: a raw torch error before
    assert run.predict(np.zeros((3, 64))).shape == (3,)  # a flattened sample of as many values is fine
