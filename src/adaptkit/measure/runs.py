"""Diagnostics of a trained run: how far apart the domains are in input space ("before") and in the learned
feature space ("after"), calibration on source validation, and the label-shift alarm — plus its pictures.

Everything here uses unlabelled target inputs; target labels, when a pair has them, only colour the class panel of
the feature map (for looking, never for choosing).
"""
from __future__ import annotations

import warnings
from pathlib import Path
from typing import Any, Dict, Optional, Union

import torch

from ..train import files
from ..train.evaluate import _chunks, model_outputs
from .diagnostics import LabelShiftWarning, expected_calibration_error, label_shift_check, shift_report

DIAGNOSTICS = "diagnostics.json"


def _flat(x: torch.Tensor) -> torch.Tensor:
    return x.reshape(x.shape[0], -1)


def diagnose(run, *, max_samples: int = 1000, seed: int = 0, plots: Union[bool, str] = False,
             path: Optional[Union[str, Path]] = None) -> Dict[str, Any]:
    """Shift diagnostics of ``run`` (an :class:`adaptkit.Run`).

    Returns a flat dict: ``before/…`` = source-validation vs target inputs (flattened), ``after/…`` = their learned
    features (source through the source encoder, target through the target encoder), for the proxy A-distance,
    MMD² and CORAL distance (only the proxy A-distance compares across the two spaces); ``source_val_ece``;
    ``label_shift_tv`` and ``label_shift_warning`` (predicted target class proportions against the source's).

    With ``path`` (default: the run folder), writes ``diagnostics.json`` there; with ``plots=True`` (or
    ``"tsne"``) also ``plots/features.png`` (inputs vs features, by domain and by class) and
    ``plots/learning_curves.png``.
    """
    pair = run.data
    xs, ys, xt, (fs, ps), (ft, pt) = _samples(run, max_samples)
    out: Dict[str, Any] = dict(shift_report((_flat(xs), _flat(xt)), (fs, ft), seed=seed))
    out["source_val_ece"] = expected_calibration_error(ps, ys)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", LabelShiftWarning)
        record = label_shift_check(pt, source_labels=pair.source_train.y, warn=True)
    out["label_shift_tv"] = record.total_variation
    out["label_shift_warning"] = str(caught[0].message) if caught else None
    for w in caught:  # pass the alarm on to the caller as well
        warnings.warn(w.message, LabelShiftWarning, stacklevel=2)
    folder = Path(path) if path is not None else run.run_dir
    if folder is not None:
        files.write_json(folder / DIAGNOSTICS, out)
        if plots:
            draw_plots(run, max_samples=max_samples, seed=seed, plots=plots, path=folder)
    return out


PLOTS = ("features.png", "learning_curves.png")  # what draw_plots writes under <run folder>/plots/


def _samples(run, max_samples: int):
    """The source-validation and target inputs the diagnostics look at (at most ``max_samples`` each), with the
    model's features and probabilities on them."""
    pair, model, dev = run.data, run.model, run.device
    n = max_samples
    xs, ys = pair.source_val.x[:n], pair.source_val.y[:n]
    if len(xs) < 2:  # a tiny source: fall back to the training inputs (they are labelled source too)
        xs, ys = pair.source_train.x[:n], pair.source_train.y[:n]
    xt = pair.target_train_x[:n]
    model.eval()
    fs, ps, _ = model_outputs(model, _chunks(xs, ys, 1024), "source", dev)
    ft, pt, _ = model_outputs(model, _chunks(xt, None, 1024), "target", dev)
    return xs, ys, xt, (fs, ps), (ft, pt)


def draw_plots(run, *, max_samples: int = 1000, seed: int = 0, plots: Union[bool, str] = True,
               path: Optional[Union[str, Path]] = None) -> None:
    """The pictures of :func:`diagnose` alone (``plots/features.png``, ``plots/learning_curves.png`` under
    ``path``, default the run folder), so a run can draw them as a step of its own after the diagnostics."""
    folder = Path(path) if path is not None else run.run_dir
    xs, ys, xt, (fs, _), (ft, _) = _samples(run, max_samples)
    from .plots import feature_map, learning_curves

    feature_map(_flat(xs), _flat(xt), fs, ft, src_labels=ys, method="tsne" if plots == "tsne" else "pca",
                path=folder / "plots" / PLOTS[0], seed=seed, panel_names=("inputs", "learned features"),
                title=f"{run.summary.get('method')} on {run.summary.get('data')}")
    keys = [k for k in ("source_val_accuracy", "target_accuracy") if any(k in h for h in run.history)]
    keys += sorted({k for h in run.history for k in h if k.startswith(("loss/", "score/"))})
    learning_curves(run.history, keys, path=folder / "plots" / PLOTS[1],
                    title=f"{run.summary.get('method')} on {run.summary.get('data')}")
