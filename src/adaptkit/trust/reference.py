"""The label-shift estimate every run summary carries, and the model it is made from.

The estimate must come from a model trained on the source alone: alignment pulls the predicted target proportions
back towards the source's and so hides label shift. A run of a method that does not train on target data
(``source_only``) uses its own model. Any other run uses a *reference* black box fitted here in a fraction of a
second: a logistic regression (scikit-learn) on the flattened inputs, standardised, on at most
:data:`MAX_ROWS` source rows and, for wide inputs, the first :data:`MAX_DIMS` principal components. BBSE is
consistent for any fixed black box whose confusion matrix is invertible (Lipton, Wang & Smola, ICML 2018
[memory]); a weak black box gives a noisier estimate, which its bootstrap interval shows. The guard uses the
neural source-only model instead (:mod:`adaptkit.trust.candidates`).
"""
from __future__ import annotations

from typing import Any, Dict

import numpy as np

from .label_shift import estimate_label_shift

__all__ = ["MAX_ROWS", "MAX_DIMS", "from_outputs", "from_inputs"]

MAX_ROWS = 5000  # ours: source rows the reference regression is fitted on
MAX_DIMS = 256  # ours: wider inputs are reduced to this many principal components first


def from_outputs(source_probs, source_labels, target_probs, estimated_from: str, seed: int = 0,
                 n_bootstrap: int = 100) -> Dict[str, Any]:
    """The estimate from a source-trained model's probabilities, as a plain dict for a summary; when it cannot be
    made (too few labelled source-validation samples of a class, …) ``{"error": why, "estimated_from": ...}``."""
    try:
        est = estimate_label_shift(source_probs, source_labels, target_probs, seed=seed, n_bootstrap=n_bootstrap)
    except ValueError as e:
        return {"error": str(e), "estimated_from": estimated_from}
    est.estimated_from = estimated_from
    return est.as_dict()


def from_inputs(pair, seed: int = 0, n_bootstrap: int = 100) -> Dict[str, Any]:
    """The estimate from the reference logistic regression on ``pair``'s inputs (see the module docstring)."""
    from sklearn.decomposition import PCA
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    flat = lambda x: x.reshape(len(x), -1).numpy().astype(np.float64)  # noqa: E731
    xs, ys = flat(pair.source_train.x), pair.source_train.y.numpy()
    if len(xs) > MAX_ROWS:
        keep = np.random.default_rng(seed).choice(len(xs), MAX_ROWS, replace=False)
        xs, ys = xs[keep], ys[keep]
    dims = min(MAX_DIMS, len(xs))  # PCA keeps at most as many components as there are samples (images: few, wide)
    steps = [StandardScaler()] + ([PCA(dims, random_state=seed)] if xs.shape[1] > dims else [])
    what = "a logistic regression on the source inputs (reference black box)"
    if len(np.unique(ys)) < pair.n_classes or len(pair.source_val) == 0:
        return {"error": "the source lacks a class, or has no validation split, to estimate from",
                "estimated_from": what}
    clf = make_pipeline(*steps, LogisticRegression(max_iter=1000)).fit(xs, ys)
    probs = lambda x: _full(clf, flat(x), pair.n_classes)  # noqa: E731
    return from_outputs(probs(pair.source_val.x), pair.source_val.y.numpy(), probs(pair.target_train_x), what,
                        seed=seed, n_bootstrap=n_bootstrap)


def _full(clf, x: np.ndarray, k: int) -> np.ndarray:
    p = clf.predict_proba(x)
    out = np.zeros((len(x), k))
    out[:, clf.classes_] = p
    return out
