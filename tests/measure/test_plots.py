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


def _legend_labels(ax):
    """Every legend on an axes (the first of two is kept with ax.add_artist, the last is ax.get_legend())."""
    from matplotlib.legend import Legend

    legends = [a for a in ax.get_children() if isinstance(a, Legend)]
    return [[t.get_text() for t in leg.get_texts()] for leg in legends]


def test_feature_map_legends_markers_and_class_colours():
    # 40 source rows, 25 target rows with 3 classes and one unknown (−1) target row
    rng = np.random.default_rng(4)
    bs, bt = rng.normal(size=(40, 4)), rng.normal(size=(25, 4)) + 2.0
    as_, at = rng.normal(size=(40, 3)), rng.normal(size=(25, 3))
    ys, yt = np.arange(40) % 3, np.arange(25) % 3
    yt[0] = -1
    fig = feature_map(bs, bt, as_, at, src_labels=ys, tgt_labels=yt, method="pca",
                      panel_names=("inputs", "learned features"))
    top, bottom = fig.axes[1], fig.axes[3]  # the right column carries the legends
    # by domain: one collection per domain, and the legend labels are exactly those collections' labels
    assert _legend_labels(top) == [["source (25 points)", "target (25 points)"]]
    # by class: a domain legend (marker) and a separate class legend (colour)
    assert sorted(_legend_labels(bottom)) == sorted([["source", "target"],
                                                     ["class 0", "class 1", "class 2", "unknown"]])
    for ax in fig.axes:
        src, tgt = ax.collections  # source drawn first, then target
        # the same number of points per domain: min(n_s, n_t) = 25 each (not 40 against 25)
        assert len(src.get_offsets()) == len(tgt.get_offsets()) == 25
        # domain by fill: source filled, target hollow (no face colour, a coloured edge)
        assert len(src.get_facecolors()) > 0 and len(tgt.get_facecolors()) == 0
    # target coloured by class: 3 class colours + grey for the −1 row, the same colours as the source uses
    src_colours = {tuple(c[:3]) for c in fig.axes[3].collections[0].get_facecolors()}  # RGB; alpha differs
    tgt_colours = {tuple(c[:3]) for c in fig.axes[3].collections[1].get_edgecolors()}
    assert len(src_colours) == 3 and len(tgt_colours) == 4 and src_colours < tgt_colours
    # both columns name the same embedding method
    assert [ax.get_title() for ax in fig.axes] == [
        "inputs, PCA — coloured by domain", "learned features, PCA — coloured by domain",
        "inputs, PCA — coloured by class", "learned features, PCA — coloured by class"]
    # no class colour repeats a domain colour or the grey of "class unknown" (tab10's grey is replaced)
    from matplotlib.colors import to_rgb

    from adaptkit.measure.plots import _DOMAIN_COLOURS, _UNKNOWN, _class_colours

    reserved = {to_rgb(c) for c in _DOMAIN_COLOURS.values()} | {to_rgb(_UNKNOWN)}
    ten = {to_rgb(c) for c in _class_colours(10)}
    assert len(ten) == 10 and not ten & reserved and not any(r == g == b for r, g, b in ten)
    note = " ".join(t.get_text() for t in fig.texts)
    assert "used only for this picture" in note and "25 source and 25 target points" in note


def test_feature_map_without_target_labels_draws_target_grey():
    bs, bt, as_, at, ys, _ = _features()
    fig = feature_map(bs, bt, as_, at, src_labels=ys, method="tsne")
    tgt = fig.axes[3].collections[1]
    assert {tuple(c[:3]) for c in tgt.get_edgecolors()} == {(0.72, 0.72, 0.72)}  # class unknown: grey
    assert "t-SNE" in fig.axes[0].get_title() and "t-SNE" in fig.axes[1].get_title()
    assert "Target labels are not known" in " ".join(t.get_text() for t in fig.texts)


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
    assert [ax.get_title() for ax in fig.axes] == ["loss", "target_acc"]  # unknown names: no note
    fig = learning_curves(history)  # every numeric key
    assert [ax.get_title() for ax in fig.axes if ax.get_visible()] == ["loss", "lr", "target_acc"]


def test_every_score_panel_says_which_direction_is_better():
    from adaptkit.select import SCORES

    history = [{"step": s, **{f"score/{k}": float(s) for k in SCORES}, "loss/align": 1.0, "target_accuracy": 0.5}
               for s in range(3)]
    fig = learning_curves(history)
    titles = {ax.get_title().split("\n")[0]: ax.get_title() for ax in fig.axes if ax.get_visible()}
    for name, spec in SCORES.items():  # the direction comes from the score's own higher_is_better
        expected = "higher is better" if spec.higher_is_better else "lower is better"
        assert titles[f"score/{name}"].endswith(expected), titles[f"score/{name}"]
    assert titles["score/dev"] == "score/dev\nlabel-free score · lower is better"
    assert "reporting only" in titles["target_accuracy"]
    assert "not a quality measure" in titles["loss/align"]
    # accuracies on one 0–1 scale (the data span only 0.5, or 0–2 for the scores)
    axes = {ax.get_title().split("\n")[0]: ax for ax in fig.axes if ax.get_visible()}
    assert axes["target_accuracy"].get_ylim() == pytest.approx((-0.02, 1.02))
    assert axes["score/source_val_accuracy"].get_ylim() != pytest.approx((-0.02, 1.02))  # values 0..2: not clipped


def test_learning_curves_unknown_key_lists_present():
    with pytest.raises(ValueError, match=re.escape(
        "The 'keys' parameter of learning_curves names metrics absent from the history: 'acc'. "
        "Metrics present: loss."
    )):
        learning_curves([{"step": 0, "loss": 1.0}], ["acc"])


def test_learning_curves_mark_the_kept_step():
    history = [{"step": s, "score/dev": 1.0 / (s + 1), "target_accuracy": 0.5} for s in range(0, 50, 10)]
    fig = learning_curves(history, kept_step=20, kept_note="the state kept by score/dev", title="t")
    for ax in fig.axes:
        if ax.get_visible():
            marks = [ln for ln in ax.get_lines() if ln.get_linestyle() == "--"]
            assert len(marks) == 1 and list(marks[0].get_xdata()) == [20.0, 20.0]
    assert fig._suptitle.get_text() == "t\ndashed line: the state kept by score/dev (step 20)"
    assert not any(ln.get_linestyle() == "--" for ax in learning_curves(history).axes for ln in ax.get_lines())
