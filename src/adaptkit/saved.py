"""Runs saved in folders, loaded back: :func:`load_run` rebuilds a finished run's model from the config it was
trained with and loads its weights safely, ready to predict.

A run folder (written by ``adaptkit.fit(run_dir=...)`` or ``adaptkit-train``) holds ``config.yaml`` (the resolved
settings), ``checkpoint.pt`` (the weights and training state, with integrity digests) and ``summary.json``. The
checkpoint is read with ``torch.load(weights_only=True)`` — no code from the file runs — and refused, exactly as
resuming refuses it, when its digests, format or config hash do not match (:func:`adaptkit.train.loop.check_checkpoint`).
"""
from __future__ import annotations

import json
import random
from pathlib import Path
from typing import Any, Mapping, Optional, Union

import numpy as np
import torch
from torch import nn

from .config import MANAGEMENT, as_plain, check_device_available, config_hash, resolve, resolve_device, run_config
from .run import Run, build_parts
from .train.loop import CHECKPOINT, SUMMARY, check_checkpoint, load_checkpoint

CONFIG = "config.yaml"
FILES = (CONFIG, CHECKPOINT, SUMMARY)  # what a finished run folder holds, at least


def _read_config(folder: Path) -> dict:
    import yaml

    try:
        plain = yaml.safe_load((folder / CONFIG).read_text(encoding="utf-8"))  # plain values only: no tags, no code
    except yaml.YAMLError as e:
        raise ValueError(f"run folder {str(folder)!r}: {CONFIG} is not readable YAML ({e}).") from None
    if not isinstance(plain, dict):
        raise ValueError(f"run folder {str(folder)!r}: {CONFIG} must hold a mapping of run settings; got "
                         f"{type(plain).__name__}.")
    return plain


def _shape(folder: Path, c, summary: Mapping[str, Any]):
    """``(input_shape, n_classes)`` the run was built for: from its summary, else the description of a
    :class:`DomainPair` given as an object, else by drawing the bundled shift its config names."""
    if "input_shape" in summary and "n_classes" in summary:
        return tuple(summary["input_shape"]), int(summary["n_classes"])
    if "input_shape" in c.data and "n_classes" in c.data:
        return tuple(c.data["input_shape"]), int(c.data["n_classes"])
    from .data.shifts import make_shift

    options = dict(c.data)
    pair = make_shift(options.pop("name"), **options)
    return tuple(pair.input_shape), pair.n_classes


def load_run(path: Union[str, Path], *, device: str = "cpu", method: Any = None, encoder: Optional[nn.Module] = None,
             head: Optional[nn.Module] = None) -> Run:
    """The finished run in folder ``path``, rebuilt from its ``config.yaml`` with the weights of its
    ``checkpoint.pt``, in evaluation mode, ready to ``predict``/``predict_proba``/``features``.

    Prediction goes through the encoder the run scored the target with: for a method with its own target encoder
    (ADDA), ``run.predict(x)`` sends ``x`` through that encoder; ``domain="source"`` uses the source one.

    Args:
        path: a run folder holding ``config.yaml``, ``checkpoint.pt`` and ``summary.json`` of a finished run.
        device: where the model goes (``"cpu"``, ``"cuda"``, ``"auto"``).
        method, encoder, head: for a run trained with its own objects (an ``nn.Module`` encoder or head, an
            ``Alignment`` instance), the same objects, built as before training; the folder records only their
            class names. Registered names and import paths need nothing.

    The returned :class:`Run` has ``data=None`` (the training data are not in the folder) and the history of
    evaluations that the checkpoint carries. The process's random generators are left as they were.

    Raises:
        FileNotFoundError: the folder, or a file it needs, is missing (both named).
        ValueError: the run has not finished; the checkpoint is damaged, of another format, or was written with
            settings other than those of ``config.yaml`` (the differing keys named); an object is needed.

    Example:
        >>> run = load_run("runs/rotated_moons/dann/seed0-1a2b3c4d")  # doctest: +SKIP
        >>> run.predict(x_new)  # doctest: +SKIP
    """
    folder = Path(path)
    if not folder.is_dir():
        raise FileNotFoundError(f"run folder {str(folder)!r} does not exist (or is not a folder); load_run needs a "
                                f"folder written by adaptkit.fit(run_dir=...) or adaptkit-train, holding "
                                f"{', '.join(FILES)}.")
    missing = [n for n in FILES if not (folder / n).is_file()]
    if missing:
        why = (" The run has not finished (no summary yet): resume it first (rerun the same command, or fit with "
               "the same run_dir)." if missing == [SUMMARY] else "")
        raise FileNotFoundError(f"run folder {str(folder)!r} lacks {', '.join(missing)}: a finished run folder "
                                f"holds {', '.join(FILES)}.{why}")
    try:
        summary = json.loads((folder / SUMMARY).read_text(encoding="utf-8"))
    except json.JSONDecodeError as e:
        raise ValueError(f"run folder {str(folder)!r}: {SUMMARY} is not valid JSON ({e}).") from None
    if not isinstance(summary, dict) or summary.get("status") != "finished":
        got = summary.get("status") if isinstance(summary, dict) else summary
        raise ValueError(f"run folder {str(folder)!r} holds a run whose status is {got!r}, not 'finished': resume "
                         "it first (rerun the same command, or fit with the same run_dir).")

    config = run_config(_read_config(folder))
    parts = {k: v for k, v in (("method", method), ("encoder", encoder), ("head", head)) if v is not None}
    for group in ("method", "encoder", "head"):
        entry = getattr(config, group)
        name = entry.get("name") if isinstance(entry, Mapping) else entry
        if group not in parts and isinstance(name, str) and name.startswith("<"):
            raise ValueError(f"run folder {str(folder)!r}: the {group} was given to the run as an object ({name}); "
                             f"{CONFIG} records only its class. Pass the same object, built as before training: "
                             f"load_run(path, {group}=...).")
    data_given = isinstance(config.data, Mapping) and "input_shape" in config.data  # a DomainPair object
    c = resolve(config, {**parts, "data": None} if data_given else parts, owner=f"{CONFIG} of {str(folder)!r}")
    c.device = device
    dev = check_device_available(resolve_device(device), device)
    input_shape, n_classes = _shape(folder, c, summary)

    saved_py, saved_np = random.getstate(), np.random.get_state()
    with torch.random.fork_rng(devices=[]):  # building the networks seeds the generators: leave the caller's alone
        try:
            model, method_obj = build_parts(c, parts, input_shape, n_classes, dev)
        finally:
            random.setstate(saved_py)
            np.random.set_state(saved_np)

    source = str(folder / CHECKPOINT)
    state = load_checkpoint(folder / CHECKPOINT)
    plain = {k: v for k, v in as_plain(c).items() if k not in MANAGEMENT}
    try:  # the checks resuming makes: format, entries, digests, settings
        check_checkpoint(state, source, config_hash(c), plain)
    except ValueError as e:
        hint = (f" Here the settings are those of {CONFIG} in the same folder: restore the {CONFIG} the run wrote."
                if "config hash" in str(e) else "")
        raise ValueError(f"{e}{hint}") from None
    try:  # torch checks the names and shapes against the rebuilt model and method
        model.load_state_dict(state["model"])
        method_obj.load_state_dict(state["method"])
    except RuntimeError as e:
        raise ValueError(f"{source} does not fit the model and method {CONFIG} describes: {e}") from None
    model.to(dev).eval()
    method_obj.to(dev).eval()
    return Run(model=model, method=method_obj, history=list(state["history"]), summary=summary, data=None,
               run_dir=folder, device=dev)
