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
    MMD² and CORAL distance (:func:`~adaptkit.measure.shift_report`). Raw MMD² and CORAL are in each space's own
    units and are not compared across spaces; their ``…_over_source_halves`` forms (each divided by the distance
    between two random source halves in the same space) and the proxy A-distance are, with a ``change/…`` each;
    ``source_val_ece``;
    ``label_shift_tv`` and ``label_shift_warning`` (predicted target class proportions against the source's).

    With ``path`` (default: the run folder), writes ``diagnostics.json`` there; with ``plots=True`` (or
    ``"tsne"``) also ``plots/features.png`` (inputs vs features, by domain and by class, as many source as target
    points; target coloured by class when the pair has target labels for scoring) and
    ``plots/learning_curves.png``.
    """
    pair = run.data
    xs, ys, xt, (fs, ps), (ft, pt) = _samples(run, max_samples)
    out: Dict[str, Any] = dict(shift_report((_flat(xs), _flat(xt)), (fs, ft), seed=seed))
    out["source_val_ece"] = expected_calibration_error(ps, ys)
    # a class-weighted run is meant to predict other proportions than the source's: no alarm (and no advice to
    # weight by class), the total variation is still reported
    weighted = isinstance(run.summary, dict) and run.summary.get("class_weights") is not None
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", LabelShiftWarning)
        record = label_shift_check(pt, source_labels=pair.source_train.y, warn=not weighted)
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
    from .plots import learning_curves

    _draw_features(run, folder / "plots" / PLOTS[0], max_samples=max_samples, seed=seed,
                   method="tsne" if plots == "tsne" else "pca")
    present = {k for h in run.history for k in h}
    keys = [k for k in ("source_val_accuracy", "target_accuracy") if k in present]
    # score/source_val_accuracy repeats the source_val_accuracy panel
    keys += sorted(k for k in present if k.startswith("score/")
                   and not (k == "score/source_val_accuracy" and "source_val_accuracy" in keys))
    keys += sorted(k for k in present if k.startswith("loss/"))
    unlabelled = "" if "target_accuracy" in present else "\n(no target labels for scoring: no target accuracy)"
    kept, rule = run.summary.get("selected_step"), run.summary.get("selected_by")
    if rule in (None, "last"):
        kept = None  # the last state is kept: no line to draw
    learning_curves(run.history, keys, path=folder / "plots" / PLOTS[1],
                    title=_title(run) + unlabelled, kept_step=kept,
                    kept_note=f"the state this run keeps, chosen by {rule}")


def _title(run) -> str:
    return f"{run.summary.get('method')} on {run.summary.get('data')}"


def _draw_features(run, path: Path, *, max_samples: int, seed: int, method: str) -> None:
    """``plots/features.png``: inputs and learned features of as many source as target points.

    Target points: when the pair has target labels for scoring, its held-out scoring rows with known labels (the
    labels colour the class panel — for looking only); otherwise the unlabelled target training inputs. Source
    points: drawn at random (``seed``) from all labelled source rows, training and validation alike, to the same
    count (at most ``max_samples``)."""
    from .plots import feature_map

    pair, model, dev = run.data, run.model, run.device
    scoring = pair.scoring_sets().get("target_test")
    if scoring is not None and len(scoring) >= 2:
        xt, yt = scoring.x, scoring.y
        note = (f"Target: {len(scoring)} held-out target rows whose labels are known for scoring"
                f"{f' ({max_samples} drawn)' if len(scoring) > max_samples else ''}.")
    else:
        xt, yt = pair.target_train_x, None
        note = None
    xs = torch.cat([pair.source_train.x, pair.source_val.x])
    ys = torch.cat([pair.source_train.y, pair.source_val.y])
    rng = torch.Generator().manual_seed(seed)
    n = min(len(xs), len(xt), max_samples)
    pick_s = torch.randperm(len(xs), generator=rng)[:n].sort().values
    pick_t = torch.randperm(len(xt), generator=rng)[:n].sort().values
    xs, ys, xt = xs[pick_s], ys[pick_s], xt[pick_t]
    yt = None if yt is None else yt[pick_t]
    model.eval()
    fs, _, _ = model_outputs(model, _chunks(xs, ys, 1024), "source", dev)
    ft, _, _ = model_outputs(model, _chunks(xt, None, 1024), "target", dev)
    feature_map(_flat(xs), _flat(xt), fs, ft, src_labels=ys, tgt_labels=yt, method=method, path=path, seed=seed,
                max_points=max(3, n), panel_names=("inputs", _features_name(run)), title=_title(run), target_note=note)


def _features_name(run) -> str:
    """The right column's name: the features of the state the run keeps (a selection rule may keep an earlier
    step than the last)."""
    step = run.summary.get("selected_step")
    return "learned features" if step is None else f"learned features at step {step}"
