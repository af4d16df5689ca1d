"""Figures for a run folder: a 2-D map of the features before and after adaptation, and learning curves.

Figures are built with matplotlib's object API on the Agg canvas — no ``pyplot``, no window, no global backend
switch — so they work on headless machines and leave a notebook's own matplotlib settings alone. Each function
returns the :class:`matplotlib.figure.Figure`; given a ``path`` it also writes a PNG atomically (to a temporary
file in the same folder, then ``os.replace``), so a reader never sees half a file.
"""
from __future__ import annotations

import math
import numbers
import os
from typing import Any, Dict, List, Mapping, Optional, Sequence, Union

import numpy as np

from adaptkit._checks import check_choice
from adaptkit.measure.diagnostics import _matrix, _to_numpy

__all__ = ["feature_map", "learning_curves", "panel_note", "save_figure"]

PathLike = Union[str, "os.PathLike[str]"]

# Domain colours (top row of the feature map) that no class colour repeats, so "source blue" is never read as "class 0"
_DOMAIN_COLOURS = {"source": "black", "target": "#b2182b"}


def _new_figure(width: float, height: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)  # attaches itself as fig.canvas
    return fig


def save_figure(fig, path: PathLike) -> str:
    """Write ``fig`` as PNG to ``path`` atomically (:func:`adaptkit.train.files.write_with`): a temporary file in
    the same folder, then a rename. Creates the parent folder if needed. Returns the path written."""
    from ..train.files import write_with

    write_with(path, lambda fh: fig.savefig(fh, format="png"))
    return os.fspath(path)


_METHOD_NAMES = {"pca": "PCA", "tsne": "t-SNE"}
_MARKERS = {"source": "o", "target": "^"}  # domain by marker and fill: source filled circles, target hollow triangles
_UNKNOWN = (0.72, 0.72, 0.72, 1.0)  # a class not known (an unlabelled target row, or no target labels at all)


def _embed(src: np.ndarray, tgt: np.ndarray, method: str, seed: int) -> tuple:
    """2-D coordinates of the pooled source and target features (one embedding, so the domains share axes), and
    the two axis labels (PCA: with the share of variance each component explains)."""
    x = np.concatenate([src, tgt])  # (n_s + n_t, d)
    if x.shape[1] < 2:  # a single feature: plot it against zero
        x = np.concatenate([x, np.zeros((len(x), 2 - x.shape[1]))], axis=1)
    if method == "pca":
        from sklearn.decomposition import PCA

        if len(x) > 1:
            pca = PCA(n_components=2, random_state=seed)
            z = pca.fit_transform(x)
            ratio = np.nan_to_num(pca.explained_variance_ratio_)
            labels = tuple(f"PCA {i + 1} ({100 * r:.0f}% of variance)" for i, r in enumerate(ratio))
        else:
            z, labels = np.zeros((len(x), 2)), ("PCA 1", "PCA 2")
    else:
        from sklearn.manifold import TSNE

        # t-SNE needs perplexity < n_samples; 30 is the usual value, smaller for tiny sets
        perplexity = float(min(30.0, max(1.0, (len(x) - 1) / 3.0)))
        z = TSNE(n_components=2, perplexity=perplexity, init="pca", random_state=seed).fit_transform(x)
        labels = ("t-SNE 1 (no units)", "t-SNE 2 (no units)")
    return z[: len(src)], z[len(src):], labels


def _class_colours(n_classes: int):
    """tab10 (tab20 beyond 10 classes) with its greys replaced, so grey means only "class unknown"."""
    import matplotlib
    from matplotlib.colors import to_rgba

    if n_classes <= 10:
        colours = list(matplotlib.colormaps["tab10"].colors)
        colours[7] = to_rgba("#4b0082")  # tab:gray → indigo
    else:
        colours = list(matplotlib.colormaps["tab20"].colors)
        colours[14], colours[15] = to_rgba("#4b0082"), to_rgba("#000000")  # the two greys
    return [to_rgba(colours[k % len(colours)]) for k in range(n_classes)]


def _scatter(ax, z: np.ndarray, domain: str, colours, label: str):
    """Source: filled circles; target: hollow triangles (the edge carries the colour). One collection per domain,
    so the legend handle is the drawn marker itself."""
    if domain == "source":
        return ax.scatter(z[:, 0], z[:, 1], s=14, alpha=0.7, c=colours, marker=_MARKERS["source"],
                          linewidths=0, label=label)
    return ax.scatter(z[:, 0], z[:, 1], s=22, alpha=0.85, facecolors="none", edgecolors=colours,
                      marker=_MARKERS["target"], linewidths=0.9, label=label)


def feature_map(before_src: Any, before_tgt: Any, after_src: Any, after_tgt: Any, *,
                src_labels: Any = None, tgt_labels: Any = None, method: str = "pca",
                path: Optional[PathLike] = None, max_points: int = 1000, seed: int = 0,
                title: Optional[str] = None, panel_names: Sequence[str] = ("before adaptation", "after adaptation"),
                target_note: Optional[str] = None):
    """Side-by-side 2-D maps of source and target features before (left) and after (right) adaptation.

    One encoding in every panel: the **domain** is the marker — source filled circles, target hollow triangles.
    Top row: coloured by domain too (source black, target dark red: colours no class uses). Bottom row, drawn when ``src_labels`` or
    ``tgt_labels`` is given: coloured by **class**, with a class legend apart from the domain legend. Target points
    are coloured by class when ``tgt_labels`` is given (rows labelled −1, and every target point when it is not,
    are grey: class unknown). Target labels are for looking only; the figure says so (``target_note`` adds to it).
    Legends sit outside the axes, so they never cover points.

    ``method="pca"`` (sklearn PCA; axes give each component's share of variance) or ``"tsne"`` (sklearn t-SNE,
    ``init="pca"``, perplexity min(30, (n−1)/3)), the same method for both columns, fitted on the pooled source
    and target of each column separately (so axes are not comparable between columns; the titles name the method).
    Both domains are drawn with the **same number of points**: each is randomly subsampled (``seed``) to
    ``min(n_s, n_t, max_points)`` rows, the same rows before and after. The "before" and "after" sets are assumed
    to be the same samples in the same order (e.g. inputs and learned features), so labels apply to both.

    ``panel_names`` titles the two columns (e.g. ``("inputs", "learned features")``).

    Shape: before_src ``(n_s, d0)``, before_tgt ``(n_t, d0)``, after_src ``(n_s, d1)``, after_tgt ``(n_t, d1)``,
    src_labels ``(n_s,)``, tgt_labels ``(n_t,)`` → Figure. Writes a PNG to ``path`` when given.
    """
    owner = "feature_map"
    method = check_choice("method", owner, method, ("pca", "tsne"))
    bs, bt = _matrix(before_src, "before_src", owner), _matrix(before_tgt, "before_tgt", owner)
    as_, at = _matrix(after_src, "after_src", owner), _matrix(after_tgt, "after_tgt", owner)
    for name, a, b in (("before", bs, bt), ("after", as_, at)):
        if a.shape[1] != b.shape[1]:
            raise ValueError(f"The {name}_src and {name}_tgt inputs of {owner} must have the same number of "
                             f"columns. Got {a.shape[1]} and {b.shape[1]}.")
    if len(bs) != len(as_) or len(bt) != len(at):
        raise ValueError(f"{owner} needs the same samples before and after adaptation. Got {len(bs)} and {len(as_)} "
                         f"source rows, {len(bt)} and {len(at)} target rows.")
    labels = {}
    for name, lab, n in (("src_labels", src_labels, len(bs)), ("tgt_labels", tgt_labels, len(bt))):
        if lab is not None:
            lab = _to_numpy(lab).reshape(-1)
            if lab.shape != (n,):
                raise ValueError(f"The {name!r} input of {owner} must have shape ({n},). Got shape {lab.shape}.")
            labels[name] = lab.astype(np.int64)
    if not isinstance(max_points, numbers.Integral) or max_points < 3:
        raise ValueError(f"The 'max_points' parameter of {owner} must be an integer >= 3. Got {max_points!r}.")

    rng = np.random.default_rng(seed)
    n = min(len(bs), len(bt), int(max_points))  # the same number of points per domain
    idx_s = np.sort(rng.choice(len(bs), n, replace=False))
    idx_t = np.sort(rng.choice(len(bt), n, replace=False))
    ys = labels.get("src_labels", None)
    yt = labels.get("tgt_labels", None)
    ys = None if ys is None else ys[idx_s]
    yt = None if yt is None else yt[idx_t]
    has_labels = ys is not None or yt is not None
    known = [y[y >= 0] for y in (ys, yt) if y is not None]
    n_classes = int(max(int(k.max()) for k in known if k.size) + 1) if any(k.size for k in known) else 0
    palette = _class_colours(n_classes)

    def by_class(y):
        if y is None:
            return [_UNKNOWN] * n
        return [palette[int(v)] if v >= 0 else _UNKNOWN for v in y]

    nrows = 2 if has_labels else 1
    fig = _new_figure(11.5, 4.6 * nrows + 0.6)
    axes = fig.subplots(nrows, 2, squeeze=False)
    from matplotlib.lines import Line2D

    shown = _METHOD_NAMES[method]
    for col, (tag, s, t) in enumerate(((panel_names[0], bs[idx_s], bt[idx_t]), (panel_names[1], as_[idx_s], at[idx_t]))):
        zs, zt, axis_labels = _embed(s, t, method, seed)
        ax = axes[0, col]
        _scatter(ax, zs, "source", [_DOMAIN_COLOURS["source"]] * n, f"source ({n} points)")
        _scatter(ax, zt, "target", [_DOMAIN_COLOURS["target"]] * n, f"target ({n} points)")
        ax.set_title(f"{tag}, {shown} — coloured by domain")
        ax.set_xlabel(axis_labels[0], fontsize=8)
        ax.set_ylabel(axis_labels[1], fontsize=8)
        if col == 1:
            ax.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize=8, title="domain", borderaxespad=0)
        if has_labels:
            ax = axes[1, col]
            _scatter(ax, zs, "source", by_class(ys), "source")
            _scatter(ax, zt, "target", by_class(yt), "target")
            ax.set_title(f"{tag}, {shown} — coloured by class")
            ax.set_xlabel(axis_labels[0], fontsize=8)
            ax.set_ylabel(axis_labels[1], fontsize=8)
            if col == 1:
                dark = (0.2, 0.2, 0.2, 1.0)
                domain_handles = [
                    Line2D([], [], linestyle="none", marker=_MARKERS["source"], markersize=6, markerfacecolor=dark,
                           markeredgewidth=0, label="source"),
                    Line2D([], [], linestyle="none", marker=_MARKERS["target"], markersize=7, markerfacecolor="none",
                           markeredgecolor=dark, label="target"),
                ]
                first = ax.legend(handles=domain_handles, loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize=8,
                                  title="domain (marker)", borderaxespad=0)
                ax.add_artist(first)
                unknown = (yt is None or (yt < 0).any()) or (ys is not None and (ys < 0).any())
                class_handles = [Line2D([], [], linestyle="none", marker="s", markersize=7, markerfacecolor=palette[k],
                                        markeredgewidth=0, label=f"class {k}") for k in range(n_classes)]
                if unknown:
                    class_handles.append(Line2D([], [], linestyle="none", marker="s", markersize=7,
                                                markerfacecolor=_UNKNOWN, markeredgewidth=0, label="unknown"))
                ax.legend(handles=class_handles, loc="upper left", bbox_to_anchor=(1.02, 0.62), fontsize=8,
                          title="class (colour)", borderaxespad=0)
    notes = [f"{n} source and {n} target points; each column is its own {shown} of those points "
             f"(axes are not comparable between columns)."
             + (" t-SNE keeps neighbourhoods, not distances: the size of a gap between groups means little."
                if method == "tsne" else "")]
    if has_labels:
        if yt is not None:
            notes.append("Target points are coloured by the labels kept for scoring: used only for this picture, "
                         "never in training or model selection.")
        else:
            notes.append("Target labels are not known: target points are grey.")
    if target_note:
        notes.append(target_note)
    fig.text(0.01, 0.0, "\n".join(notes), fontsize=8, ha="left", va="bottom", color="0.25")
    fig.get_layout_engine().set(rect=(0, 0.035 * len(notes) / nrows, 1, 1 - 0.035 * len(notes) / nrows))
    if title:
        fig.suptitle(title)
    if path is not None:
        save_figure(fig, path)
    return fig


def _is_number(v: Any) -> bool:
    return isinstance(v, numbers.Real) and not isinstance(v, bool) and math.isfinite(float(v))


_LABELLED = {
    "source_val_accuracy": "source labels · higher is better",
    "source_val_loss": "source labels · lower is better",
    "target_accuracy": "target labels, for reporting only · higher is better",
    "target_loss": "target labels, for reporting only · lower is better",
}


def panel_note(key: str) -> Optional[str]:
    """What a learning-curve panel shows and which direction is better, from the metric's name: a label-free
    selection score ``score/<name>`` takes its direction from :data:`adaptkit.select.SCORES`
    (``higher_is_better``); accuracies and losses on labelled sets say whose labels they use; a training term
    ``loss/…`` is marked as such (it is minimised, but a lower value is not a better model: an adversarial term can
    rise while the domains align). None for any other key.

    >>> panel_note("score/dev")
    'label-free score · lower is better'
    """
    if key.startswith("score/"):
        from adaptkit.select import SCORES

        name = key[len("score/"):]
        if name not in SCORES:
            return None
        better = "higher is better" if SCORES[name].higher_is_better else "lower is better"
        return ("source labels · " if name == "source_val_accuracy" else "label-free score · ") + better
    if key.startswith("loss/"):
        return "training loss (minimised; not a quality measure)"
    return _LABELLED.get(key)


def learning_curves(history: Sequence[Mapping[str, Any]], keys: Optional[Sequence[str]] = None,
                    path: Optional[PathLike] = None, *, step_key: str = "step", title: Optional[str] = None,
                    kept_step: Optional[float] = None, kept_note: str = "the kept state"):
    """One panel per metric over training steps, from a run's history (a list of records, e.g. the lines of its
    metrics log).

    ``keys``: the metrics to draw (default: every key holding a number in some record, except ``step_key``).
    The x axis is ``record[step_key]``, or the record's position when it has none. Each panel's title names the
    metric and, below it, :func:`panel_note` (for a score: "higher is better" or "lower is better"). Panels of a
    key ending in ``accuracy`` (values in [0, 1]) all span 0 to 1, so a source and a target accuracy compare by eye.
    ``kept_step`` (e.g. a run's ``selected_step`` when a selection rule kept an earlier state) draws a dashed
    vertical line at that step on every panel, explained under the title by ``kept_note``. Records that lack a key, or hold
    a non-finite value or ``None`` for it, are skipped for that panel (evaluation metrics are logged less often than
    losses). A key that never appears raises ``ValueError`` listing the keys that do.

    Shape: history ``[{"step": int, "<metric>": float, ...}, ...]`` → Figure. Writes a PNG to ``path`` when given.
    """
    owner = "learning_curves"
    if isinstance(history, Mapping) or not all(isinstance(r, Mapping) for r in history):
        raise ValueError(f"The 'history' input of {owner} must be a list of dicts (one record per log line).")
    present: Dict[str, None] = {}
    for r in history:
        for k, v in r.items():
            if k != step_key and _is_number(v):
                present.setdefault(k, None)
    if keys is None:
        keys = list(present)
    else:
        keys = [keys] if isinstance(keys, str) else list(keys)
        unknown = [k for k in keys if k not in present]
        if unknown:
            raise ValueError(
                f"The 'keys' parameter of {owner} names metrics absent from the history: {', '.join(map(repr, unknown))}. "
                f"Metrics present: {', '.join(present) if present else '(none)'}."
            )
    if not keys:
        raise ValueError(f"{owner} found no numeric metric in the history to plot.")

    ncols = min(3, len(keys))
    nrows = math.ceil(len(keys) / ncols)
    fig = _new_figure(4.0 * ncols, 3.0 * nrows)
    axes = fig.subplots(nrows, ncols, squeeze=False)
    for i, key in enumerate(keys):
        xs: List[float] = []
        ys: List[float] = []
        for pos, r in enumerate(history):
            v = r.get(key)
            if _is_number(v):
                step = r.get(step_key)
                xs.append(float(step) if _is_number(step) else float(pos))
                ys.append(float(v))
        ax = axes[i // ncols, i % ncols]
        ax.plot(xs, ys, marker="." if len(xs) < 50 else None, linewidth=1.2)
        if key.endswith("accuracy") and ys and 0.0 <= min(ys) and max(ys) <= 1.0:
            ax.set_ylim(-0.02, 1.02)  # every accuracy on the same 0–1 scale, so source and target compare by eye
        if kept_step is not None:
            ax.axvline(float(kept_step), color="0.35", linestyle="--", linewidth=1.0)
        note = panel_note(key)
        ax.set_title(key if note is None else f"{key}\n{note}", fontsize=10)
        ax.set_xlabel(step_key)
        ax.grid(True, alpha=0.3)
    for j in range(len(keys), nrows * ncols):
        axes[j // ncols, j % ncols].set_visible(False)
    if kept_step is not None:
        line = f"dashed line: {kept_note} (step {kept_step:g})"
        title = f"{title}\n{line}" if title else line
    if title:
        fig.suptitle(title)
    if path is not None:
        save_figure(fig, path)
    return fig
