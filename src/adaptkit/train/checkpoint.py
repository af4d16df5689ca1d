"""Checkpoints: what a checkpoint file holds and how resuming proves it sound before restoring anything.

Loading without running code (:func:`load_checkpoint`); the format, entries and config hash (:func:`check_checkpoint`);
the SHA-256 integrity digests of every tensor and field (:func:`checkpoint_digests`, :func:`verify_digests`); the RNG
states that travel in a checkpoint; and the refusal of values a run could not have written (:func:`check_plausible`,
called by :meth:`adaptkit.train.loop.Trainer.load_state_dict`). The loop that writes checkpoints is in
:mod:`adaptkit.train.loop`.
"""
from __future__ import annotations

import hashlib
import math
import random
from typing import Any, Dict, List, Optional

import numpy as np
import torch

from ..config import MANAGEMENT
from ..methods.base import Update
from ..plain import canonical_json, to_plain

CHECKPOINT_FORMAT = 2  # 2: integrity digests, skipped steps and updates counted apart
_CHECKPOINT_KEYS = ("config_hash", "step", "stage_index", "model", "method", "optimizers", "batches", "rng",
                    "history", "skipped_steps", "skipped_updates", "wall", "best", "best_state", "config", "running",
                    "digests")


def _plain_config(config: Any) -> Any:
    """The config as JSON types (what ``weights_only`` loading accepts), or None."""
    return None if config is None else to_plain(config)


def _config_diff(old: Any, new: Any, prefix: str = "") -> List[str]:
    """Dotted keys whose values differ between two configs, as ``key: old -> new``."""
    if isinstance(old, dict) and isinstance(new, dict):
        out = []
        for k in sorted(set(old) | set(new), key=str):
            out += _config_diff(old.get(k, "<absent>"), new.get(k, "<absent>"), f"{prefix}{k}.")
        return out
    return [] if old == new else [f"{prefix[:-1]}: {old!r} -> {new!r}"]


def load_checkpoint(path) -> Dict[str, Any]:
    """Load a checkpoint without running code from it (``weights_only=True``)."""
    try:
        return torch.load(path, map_location="cpu", weights_only=True)
    except Exception as e:  # pickle.UnpicklingError and friends: name the file and the reason
        raise ValueError(f"refusing to load {path}: it is not a plain-tensor checkpoint ({type(e).__name__}: "
                         f"{str(e).splitlines()[0] if str(e) else ''}).") from None


def check_checkpoint(state: Any, source: str, config_hash: Optional[str], config: Any = None) -> None:
    """Refuse (ValueError naming ``source`` and what is wrong) a checkpoint that is not this format, lacks or adds
    entries, fails its integrity digests (:func:`verify_digests`), or was written with settings other than those
    hashing to ``config_hash`` (the differing keys named, from ``config``). What resuming checks before it restores
    anything, and what :func:`adaptkit.load_run` checks before it loads weights."""
    if not isinstance(state, dict) or state.get("format") != CHECKPOINT_FORMAT:
        got = f"format {state.get('format')!r}" if isinstance(state, dict) else f"a {type(state).__name__}"
        why = (" (written before checkpoints carried integrity digests; resume it with the adaptkit version that "
               "wrote it, or start a new run folder)") if isinstance(state, dict) and state.get("format") == 1 else ""
        raise ValueError(f"{source} is not an adaptkit checkpoint of format {CHECKPOINT_FORMAT}; got {got}{why}.")
    missing = [k for k in _CHECKPOINT_KEYS if k not in state]
    if missing:
        raise ValueError(f"{source} lacks the checkpoint entries {missing}; it is damaged or was not written "
                         "by adaptkit.")
    unknown = sorted(set(state) - set(_CHECKPOINT_KEYS) - {"format"}, key=str)
    if unknown:
        raise ValueError(f"{source} holds unknown checkpoint entries {unknown}; accepted entries: "
                         f"{', '.join(('format',) + _CHECKPOINT_KEYS)}.")
    verify_digests(state, source)
    want = config_hash
    if state.get("config_hash") != want:
        old, new = state.get("config"), _plain_config(config)
        diff = []
        if isinstance(old, dict) and isinstance(new, dict):
            diff = _config_diff({k: v for k, v in old.items() if k not in MANAGEMENT},
                                {k: v for k, v in new.items() if k not in MANAGEMENT})
        named = f" ({'; '.join(diff[:8])})" if diff else ""
        raise ValueError(f"{source} was written by a run with config hash {state.get('config_hash')!r}, but this "
                         f"run's config hashes to {want!r}: the settings differ{named}. Use the original settings "
                         "or another run folder.")


# -- checkpoint integrity ------------------------------------------------------------------------------------------
_NESTED = (torch.Tensor, dict, list, tuple)


def _tensors(obj: Any, path: str = ""):
    """``(dotted path, tensor)`` for every tensor in a nested checkpoint, e.g. ``model.encoder.net.1.weight``."""
    if isinstance(obj, torch.Tensor):
        yield path, obj
        return
    items = obj.items() if isinstance(obj, dict) else enumerate(obj)
    for k, v in items:
        if isinstance(v, _NESTED):  # plain numbers (624 RNG words, ...) need no walk
            yield from _tensors(v, f"{path}.{k}" if path else str(k))


def _skeleton(obj: Any) -> Any:
    """The checkpoint with every tensor replaced by a marker: what the field digests cover."""
    if isinstance(obj, torch.Tensor):
        return "<tensor>"
    if isinstance(obj, dict):
        return {k: _skeleton(v) if isinstance(v, _NESTED) else v for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_skeleton(v) if isinstance(v, _NESTED) else v for v in obj]
    return obj


def tensor_digest(t: torch.Tensor) -> str:
    """SHA-256 of a tensor's dtype, shape and bytes (row-major): equal digests mean bit-identical tensors.

    Example:
        >>> a = torch.tensor([1.0, 2.0]); b = a.clone(); b.view(torch.int32)[0] ^= 1   # one flipped bit
        >>> tensor_digest(a) == tensor_digest(a.clone()), tensor_digest(a) == tensor_digest(b)
        (True, False)
    """
    c = t.detach().cpu()
    if not c.is_contiguous():
        c = c.contiguous()
    h = hashlib.sha256(f"{c.dtype} {tuple(c.shape)} ".encode())
    try:
        h.update(c.numpy())  # the tensor's own buffer, no copy
    except TypeError:  # dtypes numpy lacks (bfloat16, ...): the same bytes, seen as uint8
        h.update(c.reshape(-1).view(torch.uint8).numpy())
    return h.hexdigest()


def checkpoint_digests(state: Dict[str, Any]) -> Dict[str, Dict[str, str]]:
    """What :meth:`adaptkit.train.loop.Trainer.state_dict` records under ``"digests"``: ``tensors`` maps the dotted
    path of every tensor to :func:`tensor_digest`; ``fields`` maps each top-level entry to the SHA-256 of its
    canonical JSON with tensors replaced by a marker (steps, counts, history, RNG words, optimiser settings)."""
    body = {k: v for k, v in state.items() if k != "digests"}
    return {"tensors": {p: tensor_digest(t) for p, t in _tensors(body)}, "fields": _field_digests(body)}


def _field_digests(body: Dict[str, Any]) -> Dict[str, str]:
    return {str(k): hashlib.sha256(canonical_json(_skeleton(v)).encode()).hexdigest() for k, v in body.items()}


def verify_digests(state: Dict[str, Any], source: str = "checkpoint") -> None:
    """Recompute :func:`checkpoint_digests` and refuse (ValueError naming ``source`` and the first tensor or field
    that differs) a checkpoint whose bytes changed after it was saved: a flipped bit anywhere in a tensor or a
    recorded value is caught, whatever it does to the number."""
    recorded = state.get("digests")
    if not (isinstance(recorded, dict) and isinstance(recorded.get("tensors"), dict)
            and isinstance(recorded.get("fields"), dict)):
        raise ValueError(f"{source}: the checkpoint's 'digests' entry is damaged (expected a dict with 'tensors' and "
                         "'fields'); refusing to load it.")
    advice = "the file is damaged (changed after it was saved); refusing to load it. Resume from an intact copy " \
             "or start a new run folder."
    body = {k: v for k, v in state.items() if k != "digests"}
    found = set()
    for path, t in _tensors(body):
        found.add(path)
        want = recorded["tensors"].get(path)
        if want is None:
            raise ValueError(f"{source}: tensor {path!r} has no recorded digest; {advice}")
        got = tensor_digest(t)
        if got != want:
            raise ValueError(f"{source}: tensor {path!r} does not match the digest recorded when the checkpoint "
                             f"was saved (sha256 {got[:12]}..., recorded {str(want)[:12]}...); {advice}")
    lost = sorted(set(recorded["tensors"]) - found)
    if lost:
        raise ValueError(f"{source}: tensor {lost[0]!r} was recorded when the checkpoint was saved but is missing; "
                         f"{advice}")
    fields = _field_digests(body)
    for key in sorted(set(fields) | set(recorded["fields"]), key=str):
        if fields.get(key) != recorded["fields"].get(key):
            raise ValueError(f"{source}: field {key!r} does not match the digest recorded when the checkpoint was "
                             f"saved; {advice}")


# -- RNG states --------------------------------------------------------------------------------------------------------
def _rng_state() -> Dict[str, Any]:
    np_state = np.random.get_state()
    state = {
        "python": random.getstate(),
        "numpy": {"keys": torch.from_numpy(np_state[1].astype(np.int64)), "pos": int(np_state[2]),
                  "has_gauss": int(np_state[3]), "cached": float(np_state[4])},
        "torch": torch.get_rng_state(),
    }
    if torch.cuda.is_available():
        state["cuda"] = torch.cuda.get_rng_state_all()
    return state


def _set_rng_state(state: Dict[str, Any]) -> None:
    v, internal, gauss = state["python"]
    random.setstate((v, tuple(internal), gauss))
    n = state["numpy"]
    np.random.set_state(("MT19937", n["keys"].numpy().astype(np.uint32), n["pos"], n["has_gauss"], n["cached"]))
    torch.set_rng_state(state["torch"])
    if "cuda" in state and torch.cuda.is_available():
        torch.cuda.set_rng_state_all(state["cuda"])


# -- plausibility: values this run could have written ------------------------------------------------------------------
def check_plausible(trainer, state: Dict[str, Any], source: str) -> None:
    """Refuse every non-tensor value that ``trainer``'s run could not have written (see
    :meth:`adaptkit.train.loop.Trainer.load_state_dict`); builds the trainer's optimisers of the checkpoint's stage,
    to compare their settings."""
    def refuse(field: str, value: Any, accepted: str, shown: Optional[str] = None) -> ValueError:
        if shown is None:
            shown = repr(value) if not isinstance(value, (dict, list, tuple)) else f"a {type(value).__name__}"
        return ValueError(f"{source}: checkpoint field {field!r} is {shown}; accepted: {accepted}. The file is "
                          "damaged or was not written by this run; refusing to resume from it.")

    def integer(field: str, value: Any, low: int, high: int, why: str = "") -> int:
        if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
            raise refuse(field, value, f"an integer in [{low}, {high}]{why}")
        return value

    step = integer("step", state["step"], 0, trainer.steps, f" (this run has {trainer.steps} steps)")
    k = integer("stage_index", state["stage_index"], -1, len(trainer.stages) - 1,
                f" (-1 before the first step, else one of the method's {len(trainer.stages)} stage(s))")
    if step == 0:
        want, why = -1, "-1 (no stage has started before the first step)"
    else:
        want = next(i for i, (a, b) in enumerate(trainer.bounds) if a <= step - 1 < b)
        a, b = trainer.bounds[want]
        why = f"{want} (step {step - 1} lies in stage {trainer.stages[want].name!r}, steps [{a}, {b}))"
    if k != want:
        raise refuse("stage_index", k, why)

    opts = state["optimizers"]
    n_updates = len(trainer.stages[k].updates) if k >= 0 else 0
    if not isinstance(opts, list) or len(opts) != n_updates:
        got = f"{len(opts)} optimiser state(s)" if isinstance(opts, list) else opts
        stage = f"stage {trainer.stages[k].name!r} of method {trainer.method.name!r}" if k >= 0 else "no stage yet"
        raise refuse("optimizers", got, f"{n_updates} optimiser state(s), one per update of {stage}")
    if k >= 0:
        trainer.stage_index = k
        trainer._build_optimizers()
        t = trainer._progress(step - 1)
        factor = trainer.lr_factor(t.p)
        for i, (u, saved) in enumerate(zip(trainer.stages[k].updates, opts)):
            _check_optimizer_state(trainer, i, u, saved, step - trainer.bounds[k][0], factor, refuse)

    if not isinstance(state["running"], dict) or not all(
            isinstance(n, str) and isinstance(v, torch.Tensor) and v.dim() == 1 for n, v in state["running"].items()):
        raise refuse("running", state["running"], "a dict of loss name -> 1-d tensor of the losses since the "
                                                  "last evaluation")
    history = state["history"]
    if not isinstance(history, list):
        raise refuse("history", history, "a list of evaluation records")
    prev = 0
    for j, rec in enumerate(history):
        if not isinstance(rec, dict) or not all(isinstance(n, str) for n in rec):
            raise refuse(f"history[{j}]", rec, "a dict of metric name -> value")
        v = rec.get("step")
        if isinstance(v, bool) or not isinstance(v, int) or not prev < v <= step:
            raise refuse(f"history[{j}].step", v, f"an integer after the previous record's step ({prev}) and at "
                                                  f"most the checkpoint's step ({step})")
        prev = v
    per_step = max(sum(u.repeat for u in s.updates) for s in trainer.stages)
    ss = integer("skipped_steps", state["skipped_steps"], 0, step, " (at most one per completed step)")
    integer("skipped_updates", state["skipped_updates"], ss, ss * per_step,
            f" (each skipped step skipped 1 to {per_step} update(s))")
    wall = state["wall"]
    if isinstance(wall, bool) or not isinstance(wall, (int, float)) or not 0 <= wall < math.inf:
        raise refuse("wall", wall, "a finite number of seconds >= 0")
    best, best_state = state["best"], state["best_state"]
    if best is None or trainer.select is None:
        if best is not None or best_state is not None:
            raise refuse("best", best, "None with best_state None (this run keeps no best state)")
    else:
        steps_seen = [r["step"] for r in history]
        if not (isinstance(best, (list, tuple)) and len(best) == 2 and isinstance(best[0], (int, float))
                and not isinstance(best[0], bool) and math.isfinite(best[0]) and not isinstance(best[1], bool)
                and best[1] in steps_seen):
            raise refuse("best", best, f"[finite score, one of the evaluated steps {steps_seen}]")
        model_state = trainer.model.state_dict()
        if not isinstance(best_state, dict) or set(best_state) != set(model_state) or any(
                not isinstance(best_state[n], torch.Tensor) or best_state[n].shape != v.shape
                for n, v in model_state.items()):
            raise refuse("best_state", best_state, "the model's state dict (same names and shapes)")
    _check_rng_state(state["rng"], refuse)


def _check_optimizer_state(trainer, i: int, u: Update, saved: Any, stage_steps: int, factor: float, refuse) -> None:
    field = f"optimizers[{i}]"
    fresh = trainer.optimizers[i].state_dict()
    if not isinstance(saved, dict) or set(saved) != {"state", "param_groups"} \
            or not isinstance(saved["param_groups"], list) or len(saved["param_groups"]) != len(fresh["param_groups"]):
        raise refuse(field, saved, f"the state of update {u.name!r}'s optimiser ({len(fresh['param_groups'])} "
                                   "parameter group(s))")
    params = trainer._per_optimizer[id(trainer.optimizers[i])][0]
    for g, (got, new) in enumerate(zip(saved["param_groups"], fresh["param_groups"])):
        if not isinstance(got, dict) or got.get("params") != new["params"]:
            raise refuse(f"{field}.param_groups[{g}].params", got.get("params") if isinstance(got, dict) else got,
                         f"parameter indices {new['params']}")
        lr = trainer.base_lrs[i] * factor * new.get("lr_scale", 1.0)
        if got.get("lr") != lr:
            raise refuse(f"{field}.param_groups[{g}].lr", got.get("lr"),
                         f"{lr!r} (the learning rate the schedule gives the checkpoint's last step)")
        for name in sorted(set(got) | set(new)):
            if name not in ("params", "lr") and got.get(name, "<absent>") != new.get(name, "<absent>"):
                raise refuse(f"{field}.param_groups[{g}].{name}", got.get(name, "<absent>"),
                             f"{new.get(name, '<absent>')!r} (this run's settings for update {u.name!r})")
    if not isinstance(saved["state"], dict):
        raise refuse(f"{field}.state", saved["state"], "a dict of parameter index -> optimiser buffers")
    most = stage_steps * u.repeat  # this stage's optimiser is fresh at the stage's start
    for j, entry in saved["state"].items():
        if isinstance(j, bool) or not isinstance(j, int) or not 0 <= j < len(params) or not isinstance(entry, dict):
            raise refuse(f"{field}.state", j, f"parameter indices in [0, {len(params) - 1}], each a dict")
        for name, v in entry.items():
            where = f"{field}.state[{j}].{name}"
            if name == "step":
                n = float(v) if isinstance(v, torch.Tensor) and v.numel() == 1 else v
                if isinstance(n, bool) or not isinstance(n, (int, float)) or not 0 <= n <= most:
                    raise refuse(where, v, f"a count of optimiser steps in [0, {most}]")
            elif isinstance(v, torch.Tensor) and v.dim() > 0 and v.shape != params[j].shape:
                raise refuse(where, v, f"the parameter's shape {tuple(params[j].shape)}",
                             shown=f"a tensor of shape {tuple(v.shape)}")


def _check_rng_state(rng: Any, refuse) -> None:
    if not isinstance(rng, dict) or not {"python", "numpy", "torch"} <= set(rng):
        raise refuse("rng", rng, "a dict with the python, numpy and torch generator states")
    py = rng["python"]
    if not (isinstance(py, (tuple, list)) and len(py) == 3 and py[0] == random.getstate()[0]
            and isinstance(py[1], (tuple, list)) and len(py[1]) == 625
            and all(isinstance(w, int) and 0 <= w < 2 ** 32 for w in py[1]) and py[1][-1] <= 624
            and (py[2] is None or isinstance(py[2], float))):
        raise refuse("rng.python", py, "random.getstate() of this Python: (version, 624 32-bit words and a "
                                       "position in [0, 624], gauss)")
    n = rng["numpy"]
    keys = n.get("keys") if isinstance(n, dict) else None
    if not (isinstance(keys, torch.Tensor) and keys.shape == (624,) and keys.dtype == torch.int64
            and bool(((keys >= 0) & (keys < 2 ** 32)).all())):
        raise refuse("rng.numpy.keys", keys, "624 32-bit words (an int64 tensor)")
    for name, low, high in (("pos", 0, 624), ("has_gauss", 0, 1)):
        v = n.get(name)
        if isinstance(v, bool) or not isinstance(v, int) or not low <= v <= high:
            raise refuse(f"rng.numpy.{name}", v, f"an integer in [{low}, {high}]")
    if not isinstance(n.get("cached"), float):
        raise refuse("rng.numpy.cached", n.get("cached"), "a float")
    t, like = rng["torch"], torch.get_rng_state()
    if not (isinstance(t, torch.Tensor) and t.dtype == like.dtype and t.shape == like.shape):
        raise refuse("rng.torch", t, f"torch.get_rng_state(): a {like.dtype} tensor of shape {tuple(like.shape)}")
