"""Plots are written as valid PNG files, atomically, without a display."""
import os
import re

import numpy as np
import pytest

from adaptkit.measure.plots import feature_map, learning_curves

# PNG signature: the first 8 bytes of every PNG file (PNG specification, ISO/IEC 15948, §5.2).
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def _is_png(path):
    with open(path, "rb") as fh:
        return fh.read(8) == PNG_MAGIC


def _features(n=15, seed=0):
    rng = np.random.default_rng(seed)
    before_s, before_t = rng.normal(size=(n, 4)), rng.normal(size=(n, 4)) + 2.0
    after_s, after_t = rng.normal(size=(n, 3)), rng.normal(size=(n, 3)) + 0.2
    ys, yt = rng.integers(0, 3, n), rng.integers(0, 3, n)
    yt[0] = -1  # an unlabelled target row is drawn grey
    return before_s, before_t, after_s, after_t, ys, yt


@pytest.mark.parametrize("method", ["pca", "tsne"])
def test_feature_map_writes_png(tmp_path, method):
    bs, bt, as_, at, ys, yt = _features()
    path = tmp_path / "plots" / f"map_{method}.png"  # the folder does not exist yet
    fig = feature_map(bs, bt, as_, at, src_labels=ys, tgt_labels=yt, method=method, path=path)
    assert _is_png(path)
    assert len(fig.axes) == 4  # by domain and by class, before and after
    assert os.listdir(path.parent) == [path.name]  # no temporary file left behind


def test_feature_map_without_labels_and_no_path():
    bs, bt, as_, at, _, _ = _features()
    fig = feature_map(bs, bt, as_[:, :1], at[:, :1])  # a single feature after: still drawn
    assert len(fig.axes) == 2


def test_feature_map_rejects_unknown_method():
    bs, bt, as_, at, _, _ = _features()
    with pytest.raises(ValueError, match=re.escape(
        "The 'method' parameter of feature_map must be one of {'pca', 'tsne'}. Got 'umap' instead."
    )):
        feature_map(bs, bt, as_, at, method="umap")


def test_learning_curves_writes_png(tmp_path):
    history = [{"step": s, "loss": 1.0 / (s + 1), "lr": 0.1} for s in range(0, 100, 10)]
    history[3]["target_acc"] = 0.6  # evaluation metrics appear in fewer records
    history[7]["target_acc"] = 0.7
    history[5]["loss"] = None
    path = tmp_path / "curves.png"
    fig = learning_curves(history, ["loss", "target_acc"], path)
    assert _is_png(path)
    assert [ax.get_title() for ax in fig.axes] == ["loss", "target_acc"]
    fig = learning_curves(history)  # every numeric key
    assert [ax.get_title() for ax in fig.axes if ax.get_visible()] == ["loss", "lr", "target_acc"]


def test_learning_curves_unknown_key_lists_present():
    with pytest.raises(ValueError, match=re.escape(
        "The 'keys' parameter of learning_curves names metrics absent from the history: 'acc'. "
        "Metrics present: loss."
    )):
        learning_curves([{"step": 0, "loss": 1.0}], ["acc"])
