"""The bench's learning-curve charts: small multiples, one panel per method, seeds thin, their mean bold.

One panel per method (same axes on every panel), so that two dozen lines never overlap: each seed's target
accuracy during training as a thin line, the mean over the seeds that evaluated at a step as a thick one, and the
baseline's final mean accuracy as a dashed reference line on every panel. Nothing is drawn over the data but the
panel titles; the caption says how to read the chart.
"""
from __future__ import annotations

import math
from pathlib import Path
from typing import Callable, Dict, List, Mapping, Optional, Sequence, Tuple

__all__ = ["check_curves", "curve_chart", "mean_curve"]

Curve = List[Tuple[float, float]]
COLUMNS = 4  # ours: panels per row


def check_curves(curves) -> dict:
    """``{(method, shift, seed): [(step, accuracy or nan), ...] sorted by step}`` from what the caller passed;
    TypeError/ValueError naming the bad key or point."""
    if not isinstance(curves, Mapping):
        raise TypeError("The 'curves' parameter of write_report must be a mapping "
                        f"(method, shift, seed) -> [(step, target_accuracy), ...]. Got {type(curves).__name__} instead.")
    out = {}
    for key, points in curves.items():
        if not (isinstance(key, tuple) and len(key) == 3):
            raise ValueError("Keys of the 'curves' parameter of write_report must be (method, shift, seed) tuples. "
                             f"Got {key!r} instead.")
        pts = []
        for p in points:
            if not (isinstance(p, (tuple, list)) and len(p) == 2):
                raise ValueError(f"Points of curve {key!r} must be (step, target_accuracy) pairs. Got {p!r} instead.")
            step, acc = p
            pts.append((float(step), math.nan if acc is None else float(acc)))
        out[key] = sorted(pts)
    return out


def mean_curve(seed_curves: Sequence[Curve]) -> Curve:
    """The mean accuracy at each step over the seeds with a finite value there (a seed that stopped early or has
    a gap simply does not count at that step)."""
    by_step: Dict[float, List[float]] = {}
    for pts in seed_curves:
        for step, acc in pts:
            if math.isfinite(acc):
                by_step.setdefault(step, []).append(acc)
    return [(s, sum(v) / len(v)) for s, v in sorted(by_step.items())]


def curve_chart(curves: dict, shift: str, methods: Sequence[str], path: Path, *, baseline: Optional[str],
                oracle: Optional[str] = None, new_figure: Callable, save: Callable) -> Path:
    """Draw ``shift``'s curves (as :func:`check_curves` returns them) for ``methods`` (plus any other method that
    has curves on ``shift``) into ``path`` through ``new_figure(width, height) -> Figure`` and ``save(fig, path)``."""
    order = list(methods) + sorted({k[0] for k in curves if k[1] == shift} - set(methods))
    per_method = {m: [pts for (cm, cs, _), pts in sorted(curves.items(), key=lambda kv: str(kv[0]))
                      if cm == m and cs == shift and pts] for m in order}
    order = [m for m in order if per_method[m]]
    base = None
    if baseline in per_method and per_method[baseline]:
        finals = [pts[-1][1] for pts in per_method[baseline] if math.isfinite(pts[-1][1])]
        base = 100 * sum(finals) / len(finals) if finals else None
    cols = max(1, min(COLUMNS, len(order)))
    rows = max(1, math.ceil(len(order) / cols))
    fig = new_figure(2.4 * cols + 0.4, 2.0 * rows + 0.9)
    axes = fig.subplots(rows, cols, sharex=True, sharey=True, squeeze=False)
    for i, ax in enumerate(axes.flat):
        if i >= len(order):
            ax.set_visible(False)
            continue
        m = order[i]
        for pts in per_method[m]:
            ax.plot([s for s, _ in pts], [100 * a for _, a in pts], color=f"C{i % 10}", linewidth=0.7, alpha=0.45)
        mean = mean_curve(per_method[m])
        ax.plot([s for s, _ in mean], [100 * a for _, a in mean], color=f"C{i % 10}", linewidth=2.0)
        if base is not None:
            ax.axhline(base, color="0.3", linestyle="--", linewidth=0.8)
        note = ", uses target labels" if m == oracle else ""
        ax.set_title(f"{m} ({len(per_method[m])} seed{'s' if len(per_method[m]) != 1 else ''}{note})", fontsize=8)
        ax.set_ylim(0, 100)
        ax.tick_params(labelsize=7)
        ax.grid(True, linewidth=0.3, alpha=0.5)
    for c in range(cols):  # the lowest visible panel of each column carries the step axis
        lowest = axes[(len(order) - 1 - c) // cols, c]
        lowest.xaxis.set_tick_params(labelbottom=True)
        lowest.set_xlabel("step", fontsize=8)
    for ax in axes[:, 0]:
        ax.set_ylabel("target acc. (%)", fontsize=8)
    ref = f"; dashed: {baseline}'s final mean ({base:.1f} %)" if base is not None else ""
    fig.suptitle(f"{shift}: target accuracy during training — thin: one seed, thick: mean over seeds{ref}; "
                 "higher is better", fontsize=9)
    return save(fig, path)
