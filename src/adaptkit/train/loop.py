"""The one training loop. It knows nothing about any method: it cycles paired batches, runs the current stage's
updates in order (one optimiser each), applies learning-rate schedules, evaluates, logs and checkpoints.

Read top to bottom: ``Trainer.run`` → ``_step`` → ``_run_update``; evaluation, checkpoint and summary below.
"""
from __future__ import annotations

import contextlib
import copy
import hashlib
import math
import random
import signal
import sys
import time
from pathlib import Path
from typing import Any, Callable, Dict, List, Optional, Tuple

import numpy as np
import torch

from ..methods.base import Alignment, Progress, Stage, Update
from ..nets.model import AdaptedModel
from ..plain import canonical_json
from . import files
from .optim import OptimSettings, make_optimizer, parameter_groups
from ..config import MANAGEMENT
from ..plain import to_plain
from .precision import autocast_for
from .schedules import lr_schedule

CHECKPOINT = "checkpoint.pt"
SUMMARY = "summary.json"
METRICS = "metrics.jsonl"
BEST = "best.pt"
CHECKPOINT_FORMAT = 2  # 2: integrity digests, skipped steps and updates counted apart
_CHECKPOINT_KEYS = ("config_hash", "step", "stage_index", "model", "method", "optimizers", "batches", "rng",
                    "history", "skipped_steps", "skipped_updates", "wall", "best", "best_state", "config", "running",
                    "digests")


class DivergenceError(RuntimeError):
    """A loss or parameter became NaN/inf. The message names the update and step; the run folder keeps the last
    finite checkpoint."""


class Interrupted(RuntimeError):
    """SIGTERM/SIGINT arrived: a checkpoint was written at the step boundary and the run can be resumed.

    A second signal while that step finishes raises ``KeyboardInterrupt`` at once instead; every file in the run
    folder is written atomically, so the folder still holds the previous checkpoint, loadable and resumable."""




_ONE: Dict[torch.device, torch.Tensor] = {}  # the 1.0 "inverse scale" of the fused scan, one per device (read only)


def all_finite(tensors: List[torch.Tensor]) -> bool:
    """Whether every entry of every tensor is finite (no NaN, no ±inf), decided exactly whatever the magnitudes.

    One fused scan where torch offers it: the kernel behind ``torch.amp.GradScaler``
    (``torch._amp_foreach_non_finite_check_and_unscale_``) sets a flag when any entry is NaN/inf and multiplies each
    tensor by an inverse scale; at scale 1.0 it returns every value unchanged (the kernel's ``inv_scale == 1`` branch),
    so every number keeps its bits (a half/bfloat16 NaN may come back as another NaN, from the kernel's round trip
    through float32: such a step is never applied). It tests each entry, so finite values of any size (1e20, 3e38) pass: nothing
    is summed, nothing can overflow. One device sync. Where that kernel refuses the list (sparse or mixed-device
    tensors, an old torch), :func:`_all_finite_by_norms` decides instead, exactly as well.

    Example:
        >>> all_finite([torch.full((1000,), 1e20), torch.tensor(2.0)]), all_finite([torch.tensor([1.0, float("nan")])])
        (True, False)
    """
    if not tensors:
        return True
    dev = tensors[0].device
    one = _ONE.get(dev)
    if one is None:
        one = _ONE[dev] = torch.ones(1, device=dev)
    found = torch.zeros(1, device=dev)  # a fresh flag per call: trainers in threads never share one
    try:
        torch._amp_foreach_non_finite_check_and_unscale_(tensors, found, one)
    except (AttributeError, RuntimeError, NotImplementedError):
        return _all_finite_by_norms(tensors)
    return not float(found)


def _all_finite_by_norms(tensors: List[torch.Tensor]) -> bool:
    """The exact fallback: a finite sum of per-tensor 2-norms proves every entry finite (a NaN/inf entry makes its
    tensor's norm and the sum NaN/inf); a non-finite sum may be an overflow of finite values (a 2-norm of 1000
    entries of 1e20 is inf in float32), so then each tensor is tested entry by entry."""
    try:
        norms = torch._foreach_norm(tensors)
        if math.isfinite(float(torch.stack([n.to(norms[0].device) for n in norms]).sum())):
            return True
    except (AttributeError, RuntimeError, NotImplementedError):
        pass
    return all(bool(torch.isfinite(t).all()) for t in tensors)


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


def stage_bounds(stages: List[Stage], steps: int) -> List[Tuple[int, int]]:
    """Split ``steps`` between stages in proportion to their ``share``; the last stage takes the remainder."""
    total = sum(s.share for s in stages)
    bounds, start = [], 0
    for i, s in enumerate(stages):
        end = steps if i == len(stages) - 1 else start + int(round(steps * s.share / total))
        bounds.append((start, end))
        start = end
    return bounds


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


class Trainer:
    """Runs an alignment module's stages on a model.

    Args:
        model: encoder + head (+ target encoder), already on ``device``.
        method: an :class:`Alignment` already attached to ``model``.
        batches: anything with ``next() -> Batch`` and ``state_dict``/``load_state_dict``.
        steps: total training steps over all stages.
        optim: optimiser settings shared by every update (each update may override some).
        evaluate: ``model -> {metric: value}``; called every ``eval_every`` steps and at the end.
        run_dir: where checkpoints, metrics and the summary go (None: keep everything in memory).
        meta: recorded in the summary and checkpoint (method, data, seed, config, config hash).
        select: ``(metric, higher_is_better)``: keep the evaluated state that this metric ranks best and
            return the model with it at the end. ``None`` keeps the last state.
        on_nonfinite: ``"stop"`` raises :class:`DivergenceError`; ``"skip"`` skips the update and counts it: the
            summary's ``skipped_updates`` counts skipped updates, ``skipped_steps`` the steps with at least one.
        precision: ``float32``, or ``bf16`` (CUDA autocast of each update's loss, :mod:`adaptkit.train.precision`).
        device: the device the model is on (``bf16`` needs CUDA).
        check_gradients: check every gradient entry for NaN/inf before each optimiser step (default). ``False``
            checks only the loss at each update and the parameters at evaluations and checkpoints: a little faster
            for tiny models (see benchmarks/RESULTS.md), and a NaN gradient is then caught later.

    Steps count completed steps: a checkpoint with ``step == k`` holds the state after k steps, which is the state
    step k (``Progress.step == k``, 0-based) starts from. What a run folder guarantees:

    - SIGTERM/SIGINT: the current step finishes, a checkpoint is written, :class:`Interrupted` is raised; a second
      signal raises ``KeyboardInterrupt`` at once. Every write is atomic, so the folder always holds whole files.
    - A non-finite loss at step k, or non-finite parameters after one of its optimiser steps, raises
      :class:`DivergenceError` before anything is written: the folder keeps the checkpoint written after
      ``(k // checkpoint_every) * checkpoint_every`` steps (exactly k with ``checkpoint_every=1``), or an older one.
    - Resuming from any checkpoint reproduces the uninterrupted run bit for bit on CPU: parameters, optimiser
      state, batch positions, RNG states, the history and the losses gathered since the last evaluation travel in it.
    - A checkpoint proves its integrity: it records a SHA-256 digest of every tensor and field, and resuming refuses
      (naming the tensor or field) a file changed after saving, or values this run could not have written.
    """

    def __init__(self, model: AdaptedModel, method: Alignment, batches, *, steps: int, optim: OptimSettings,
                 evaluate: Callable[[AdaptedModel], Dict[str, Any]], eval_every: int = 100,
                 checkpoint_every: int = 0, run_dir: Optional[Path] = None, progress: Optional[bool] = None,
                 meta: Optional[Dict[str, Any]] = None, select: Optional[Tuple[str, bool]] = None,
                 on_nonfinite: str = "stop", handle_signals: bool = True, check_gradients: bool = True,
                 distributed=None, precision: str = "float32", device: Any = "cpu"):
        self.model, self.method, self.batches = model, method, batches
        self.distributed = distributed  # train/distributed.py's Distributed under torchrun, else None
        self.steps, self.optim, self.evaluate = steps, optim, evaluate
        self.eval_every, self.checkpoint_every = max(1, eval_every), checkpoint_every
        self.run_dir = Path(run_dir) if run_dir is not None else None
        self.progress, self.meta, self.select = progress, dict(meta or {}), select
        self.on_nonfinite, self.handle_signals = on_nonfinite, handle_signals
        self.check_gradients = check_gradients
        self.on_record: Optional[Callable[[Dict[str, Any]], None]] = None  # each evaluation record, once written (trackers)
        self.precision, self.device = precision, torch.device(device)
        self._forward = autocast_for(precision, self.device)  # refuses bf16 off CUDA; reused by every update
        self.stages = method.training_stages()
        if not self.stages:
            raise ValueError(f"method {method.name!r} declared no stages")
        self.bounds = stage_bounds(self.stages, steps)
        self.lr_factor = lr_schedule(optim.schedule, "optim")
        # training state (everything below goes into a checkpoint)
        self.step = 0
        self.stage_index = -1  # the stage whose on_stage_start has run
        self.optimizers: List[torch.optim.Optimizer] = []
        self.base_lrs: List[float] = []
        self.history: List[Dict[str, Any]] = []
        self.skipped_steps = 0  # steps in which at least one update was skipped (on_nonfinite="skip")
        self.skipped_updates = 0  # updates skipped, over all steps
        self.wall = 0.0
        self.best: Optional[Tuple[float, int]] = None  # (score, step)
        self.best_state: Optional[Dict[str, Any]] = None
        self._running: Dict[str, List[torch.Tensor]] = {}
        self._stop_requested = 0
        self._saved_step: Optional[int] = None  # the step of the checkpoint on disk, when this process knows it

    # -- the loop ------------------------------------------------------------------------------------------
    def run(self, until: Optional[int] = None) -> Optional[Dict[str, Any]]:
        """Train to the last step and return the summary; with ``until`` < steps, train to that step, evaluate
        there and pause (returns None): a later ``run()`` continues as if the run had never stopped (the stage
        bounds and schedules are those of the full run). Guarded runs screen their candidates this way."""
        from tqdm.auto import tqdm

        stop = self.steps if until is None else min(int(until), self.steps)

        show = self.progress if self.progress is not None else (sys.stderr.isatty() or in_notebook())
        bar = tqdm(total=self.steps, initial=self.step, disable=not show, desc=self.meta.get("method", "train"),
                   dynamic_ncols=True, leave=False)
        old_handlers = self._install_signal_handlers()
        if self.run_dir is not None:
            files.remove_temporaries(self.run_dir)  # left by a process killed between a write and its rename
        t0 = time.perf_counter()
        try:
            while self.step < stop:
                self._enter_stage_for(self.step)
                self._step()
                self.step += 1
                bar.update(1)
                if self.step % self.eval_every == 0 or self.step == stop:
                    self.wall += time.perf_counter() - t0
                    t0 = time.perf_counter()
                    self._evaluate_and_log()
                    bar.set_postfix({k: f"{v:.3f}" for k, v in self.history[-1].items()
                                     if k.endswith("accuracy") and isinstance(v, float)}, refresh=False)
                if self.checkpoint_every and self.step % self.checkpoint_every == 0 and self.step < self.steps:
                    self.wall += time.perf_counter() - t0
                    t0 = time.perf_counter()
                    self.save_checkpoint()
                if self.distributed is not None:  # every rank stops at the same step
                    self._stop_requested = self.distributed.any_rank(self._stop_requested)
                if self._stop_requested and self.step < self.steps:  # after the last step: just finish
                    self.wall += time.perf_counter() - t0
                    self.save_checkpoint()
                    raise Interrupted(f"interrupted, resumable: stopped after {self.step} of {self.steps} steps; "
                                      "rerun the same command (or fit with the same run_dir) to continue"
                                      + (f" from {self.run_dir}" if self.run_dir else " (no run_dir: nothing saved)"))
            self.wall += time.perf_counter() - t0
        finally:
            bar.close()
            self._restore_signal_handlers(old_handlers)
        if self.step < self.steps:  # paused at `until`
            return None
        if self.select is not None and self.best_state is not None:
            self.model.load_state_dict(self.best_state)
        summary = self.summary()
        if self.run_dir is not None:
            self.save_checkpoint()  # the final state, so a finished run can be inspected or continued
            files.write_json(self.run_dir / SUMMARY, summary)
        return summary

    def _enter_stage_for(self, step: int) -> None:
        if self.stage_index >= 0 and self.bounds[self.stage_index][0] <= step < self.bounds[self.stage_index][1]:
            return  # the common case: still inside the current stage
        i = next(k for k, (a, b) in enumerate(self.bounds) if a <= step < b)
        if i != self.stage_index:
            self.stage_index = i
            self.method.on_stage_start(self.stages[i])
            self._build_optimizers()

    def _build_optimizers(self) -> None:
        stage = self.stages[self.stage_index]
        self.optimizers, self.base_lrs, self._per_optimizer = [], [], {}
        for u in stage.updates:
            s = self.optim.with_overrides(u.optimizer, f"update {u.name!r} of method {self.method.name!r}")
            params = u.parameters()
            if not params:
                raise ValueError(f"update {u.name!r} of method {self.method.name!r} declares no trainable parameters")
            groups = parameter_groups(u.modules, params)  # by learning-rate scale (a backbone's may be lower)
            params = [p for g in groups for p in g["params"]]  # the optimiser's own order: its state indexes these
            opt = make_optimizer(groups, s)
            self.optimizers.append(opt)
            self.base_lrs.append(s.lr)
            # what the optimiser steps (the tensors checked before each step) and the running-loss keys, found
            # once per stage rather than once per update
            self._per_optimizer[id(opt)] = (params, f"loss/{u.name}", {})

    def _progress(self, step: int) -> Progress:
        """Where step ``step`` (0-based) stands in its stage; ``self.stage_index`` must be that step's stage."""
        a, b = self.bounds[self.stage_index]
        return Progress(step, self.stages[self.stage_index].name, step - a, (step - a) / max(1, b - a))

    def _step(self) -> None:
        t = self._progress(self.step)
        factor = self.lr_factor(t.p)
        batch = self.batches.next()
        skipped_before = self.skipped_updates
        for u, opt, base in zip(self.stages[self.stage_index].updates, self.optimizers, self.base_lrs):
            lr = base * factor
            if opt.param_groups[0]["lr"] != lr * opt.param_groups[0].get("lr_scale", 1.0):
                for group in opt.param_groups:
                    group["lr"] = lr * group.get("lr_scale", 1.0)  # a lower-rate backbone keeps its share
            for _ in range(u.repeat):
                self._run_update(u, opt, batch, t)
        if self.skipped_updates != skipped_before:
            self.skipped_steps += 1  # a step counts once however many of its updates were skipped

    def _run_update(self, u: Update, opt: torch.optim.Optimizer, batch, t: Progress) -> None:
        params, loss_key, keys = self._per_optimizer[id(opt)]
        opt.zero_grad(set_to_none=True)
        dist = self.distributed
        with (dist.gathering(self.model, t.step) if dist is not None else contextlib.nullcontext()), self._forward:
            out = u.loss(batch, t)  # under torchrun: on the global batch, from features gathered across ranks;
            # the forward passes under bf16 autocast or nothing (backward runs outside it)
        if not (isinstance(out, tuple) and len(out) == 2 and isinstance(out[0], torch.Tensor)):
            raise TypeError(f"the loss of update {u.name!r} of method {self.method.name!r} must return (loss, logs): "
                            f"a scalar tensor and a dict of scalars to log ({{}} for none). Got {type(out).__name__} "
                            "instead.")
        loss, logs = out
        loss.backward()
        if dist is not None:  # the mean over ranks is the 1-process gradient (see train/distributed.py)
            dist.average_gradients(params)
            dist.sync_norm_buffers((self.model, self.method))  # BatchNorm saw this rank's slice in the forward
        value = loss.detach()
        # One exact check, one device sync per update, *before* the step is applied: a NaN/inf loss or gradient
        # leaves the parameters untouched. (A step that overflows finite gradients is caught at the next evaluation
        # or checkpoint, which check every parameter.)
        if self.check_gradients:
            finite = all_finite([value, *[p.grad for p in params if p.grad is not None]])
        else:
            finite = math.isfinite(float(value))
        if not finite:
            self._nonfinite(u, opt, t, loss)
            return
        opt.step()
        acc = self._running
        acc.setdefault(loss_key, []).append(value)
        for k, v in logs.items():
            key = keys.get(k)
            if key is None:
                key = keys[k] = f"{u.name}/{k}"
            if not isinstance(v, torch.Tensor):
                v = torch.tensor(v)
            elif v.requires_grad:  # methods usually log detached values already
                v = v.detach()
            acc.setdefault(key, []).append(v)

    def _nonfinite(self, u: Update, opt: torch.optim.Optimizer, t: Progress, loss: torch.Tensor) -> None:
        if self.on_nonfinite == "skip":
            self.skipped_updates += 1
            opt.zero_grad(set_to_none=True)
            return
        value = float(loss.detach())
        if math.isfinite(value):
            names = {id(p): n for n, p in self.model.named_parameters()}
            names.update({id(p): f"method.{n}" for n, p in self.method.named_parameters()})
            bad = [names.get(id(p), "?") for p in self._per_optimizer[id(opt)][0]
                   if p.grad is not None and not all_finite([p.grad])]
            raise DivergenceError(self._divergence_message(u, t, value, bad))
        raise DivergenceError(self._divergence_message(u, t, value))

    def _divergence_message(self, u: Update, t: Progress, value: float, bad_params=()) -> str:
        last = next((h for h in reversed(self.history)), None)
        finite = {k: v for k, v in (last or {}).items() if k.startswith("loss/")}
        if self.run_dir is not None and (self.run_dir / CHECKPOINT).exists():
            at = f" (saved after {self._saved_step} completed steps)" if self._saved_step is not None else ""
            kept = f"the last finite checkpoint{at} is kept in {self.run_dir / CHECKPOINT}"
        else:
            kept = "no checkpoint was written yet"
        if math.isfinite(value):
            shown = ", ".join(bad_params[:5]) + (f" and {len(bad_params) - 5} more" if len(bad_params) > 5 else "")
            what = f"produced non-finite gradients for parameter(s) {shown} (step not applied)"
        else:
            what = f"produced a non-finite loss ({value})"
        return (f"method {self.method.name!r}: update {u.name!r} in stage {t.stage!r} {what} at step {t.step}. "
                f"Last finite losses (step {last['step'] if last else '-'}): {finite or 'none recorded'}; {kept}. "
                "Lower the learning rate or the alignment weight, or pass on_nonfinite='skip' to skip such steps.")

    # -- evaluation and logging ----------------------------------------------------------------------------
    def _evaluate_and_log(self) -> None:
        record: Dict[str, Any] = {"step": self.step, "stage": self.stages[self.stage_index].name}
        for k, vals in self._running.items():
            dev = vals[-1].device  # losses from a checkpoint come back on the CPU
            record[k] = float(torch.stack([v if v.device == dev else v.to(dev) for v in vals]).mean())
        self._running = {}
        was_training = self.model.training
        self._check_parameters_finite()
        self.model.eval()
        self.method.eval()
        try:
            record.update(self.evaluate(self.model))
        finally:
            self.model.train(was_training)
            self.method.train(was_training)
        record["wall_seconds"] = round(self.wall, 3)
        self.history.append(record)
        if self.select is not None:
            key, higher = self.select
            v = record.get(key)
            if v is not None and math.isfinite(v):
                score = v if higher else -v
                if self.best is None or score > self.best[0]:
                    self.best = (score, self.step)
                    self.best_state = copy.deepcopy(self.model.state_dict())
                    if self.run_dir is not None:
                        files.write_torch(self.run_dir / BEST, {"step": self.step, "metric": key, "value": v,
                                                                 "model": self.best_state})
        if self.run_dir is not None:
            files.write_jsonl(self.run_dir / METRICS, self.history)
        if self.on_record is not None:
            self.on_record(record)

    def _check_parameters_finite(self) -> None:
        named = list(self.model.named_parameters()) + list(self.method.named_parameters())
        if _all_finite_by_norms([p.detach() for _, p in named]):  # read-only; name the culprit only if needed
            return
        for name, p in named:
            if not torch.isfinite(p).all():
                raise DivergenceError(f"method {self.method.name!r}: parameter {name!r} is not finite at step "
                                      f"{self.step}; the last finite checkpoint is kept.")

    def summary(self) -> Dict[str, Any]:
        last = self.history[-1] if self.history else {}
        chosen = last
        if self.select is not None and self.best is not None:
            chosen = next(h for h in self.history if h["step"] == self.best[1])
        s = {k: v for k, v in self.meta.items() if k != "config"}
        s.update({
            "status": "finished",
            "steps": self.step,
            "wall_seconds": round(self.wall, 3),
            "skipped_steps": self.skipped_steps,
            "skipped_updates": self.skipped_updates,
            "source_val_accuracy": chosen.get("source_val_accuracy"),
            "target_accuracy": chosen.get("target_accuracy"),
            "selected_by": self.select[0] if self.select else "last",
            "selected_step": chosen.get("step"),
            "final": last,
        })
        return s

    # -- checkpoints ---------------------------------------------------------------------------------------
    def state_dict(self) -> Dict[str, Any]:
        state = {
            "format": CHECKPOINT_FORMAT,
            "config_hash": self.meta.get("config_hash"),
            "config": _plain_config(self.meta.get("config")),  # the resolved config, to name what differs
            "step": self.step,
            "stage_index": self.stage_index,
            "model": self.model.state_dict(),
            "method": self.method.state_dict(),
            "optimizers": [o.state_dict() for o in self.optimizers],
            "batches": self.batches.state_dict(),
            "rng": _rng_state(),
            "history": self.history,
            "running": {k: torch.stack(v) for k, v in self._running.items()},  # losses since the last evaluation
            "skipped_steps": self.skipped_steps,
            "skipped_updates": self.skipped_updates,
            "wall": self.wall,
            "best": list(self.best) if self.best else None,
            "best_state": self.best_state,
        }
        state["digests"] = checkpoint_digests(state)
        return state

    def load_state_dict(self, state: Dict[str, Any], source: str = "checkpoint") -> None:
        """Resume from ``state`` (what :meth:`state_dict` returned, e.g. read by :func:`load_checkpoint`).

        Refused with a ValueError naming ``source`` and what is wrong (before the training state is restored; the
        model's weights may already be loaded): another format; missing or unknown entries; a tensor or field whose digest differs from the one recorded at saving (a
        damaged file; the tensor is named, e.g. ``model.encoder.net.1.weight``); other settings (the config hash);
        a value this run could not have written (step outside ``[0, steps]``, a stage index that is not the
        step's stage, batch positions beyond the data, history records after the checkpoint's step, negative
        counts, ...; the field, its value and the accepted range are named).
        """
        check_checkpoint(state, source, self.meta.get("config_hash"), self.meta.get("config"))
        try:  # torch checks the names and shapes against this model and method
            self.model.load_state_dict(state["model"])
            self.method.load_state_dict(state["method"])
        except RuntimeError as e:
            raise ValueError(f"{source} does not fit this model/method: {e}") from None
        self._check_plausible(state, source)
        try:
            self.batches.load_state_dict(state["batches"])  # checks its positions against the data first
        except (ValueError, TypeError, KeyError, IndexError, RuntimeError) as e:
            raise ValueError(f"{source}: field 'batches' (the batch streams) is refused: {e}") from None
        self.step = state["step"]
        self.stage_index = state["stage_index"]
        if self.stage_index >= 0:
            for o, s in zip(self.optimizers, state["optimizers"]):  # built by _check_plausible for this stage
                o.load_state_dict(s)
        _set_rng_state(state["rng"])
        self.history = list(state["history"])
        self._running = {k: list(v.unbind(0)) for k, v in state["running"].items()}
        self.skipped_steps, self.skipped_updates = state["skipped_steps"], state["skipped_updates"]
        self.wall = float(state["wall"])
        self.best = tuple(state["best"]) if state["best"] else None
        self.best_state = state["best_state"]
        self._saved_step = self.step

    def _check_plausible(self, state: Dict[str, Any], source: str) -> None:
        """Refuse every non-tensor value that this run could not have written (see :meth:`load_state_dict`);
        builds the optimisers of the checkpoint's stage, to compare their settings."""
        def refuse(field: str, value: Any, accepted: str, shown: Optional[str] = None) -> ValueError:
            if shown is None:
                shown = repr(value) if not isinstance(value, (dict, list, tuple)) else f"a {type(value).__name__}"
            return ValueError(f"{source}: checkpoint field {field!r} is {shown}; accepted: {accepted}. The file is "
                              "damaged or was not written by this run; refusing to resume from it.")

        def integer(field: str, value: Any, low: int, high: int, why: str = "") -> int:
            if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
                raise refuse(field, value, f"an integer in [{low}, {high}]{why}")
            return value

        step = integer("step", state["step"], 0, self.steps, f" (this run has {self.steps} steps)")
        k = integer("stage_index", state["stage_index"], -1, len(self.stages) - 1,
                    f" (-1 before the first step, else one of the method's {len(self.stages)} stage(s))")
        if step == 0:
            want, why = -1, "-1 (no stage has started before the first step)"
        else:
            want = next(i for i, (a, b) in enumerate(self.bounds) if a <= step - 1 < b)
            a, b = self.bounds[want]
            why = f"{want} (step {step - 1} lies in stage {self.stages[want].name!r}, steps [{a}, {b}))"
        if k != want:
            raise refuse("stage_index", k, why)

        opts = state["optimizers"]
        n_updates = len(self.stages[k].updates) if k >= 0 else 0
        if not isinstance(opts, list) or len(opts) != n_updates:
            got = f"{len(opts)} optimiser state(s)" if isinstance(opts, list) else opts
            stage = f"stage {self.stages[k].name!r} of method {self.method.name!r}" if k >= 0 else "no stage yet"
            raise refuse("optimizers", got, f"{n_updates} optimiser state(s), one per update of {stage}")
        if k >= 0:
            self.stage_index = k
            self._build_optimizers()
            t = self._progress(step - 1)
            factor = self.lr_factor(t.p)
            for i, (u, saved) in enumerate(zip(self.stages[k].updates, opts)):
                self._check_optimizer_state(i, u, saved, step - self.bounds[k][0], factor, refuse)

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
        per_step = max(sum(u.repeat for u in s.updates) for s in self.stages)
        ss = integer("skipped_steps", state["skipped_steps"], 0, step, " (at most one per completed step)")
        integer("skipped_updates", state["skipped_updates"], ss, ss * per_step,
                f" (each skipped step skipped 1 to {per_step} update(s))")
        wall = state["wall"]
        if isinstance(wall, bool) or not isinstance(wall, (int, float)) or not 0 <= wall < math.inf:
            raise refuse("wall", wall, "a finite number of seconds >= 0")
        best, best_state = state["best"], state["best_state"]
        if best is None or self.select is None:
            if best is not None or best_state is not None:
                raise refuse("best", best, "None with best_state None (this run keeps no best state)")
        else:
            steps_seen = [r["step"] for r in history]
            if not (isinstance(best, (list, tuple)) and len(best) == 2 and isinstance(best[0], (int, float))
                    and not isinstance(best[0], bool) and math.isfinite(best[0]) and not isinstance(best[1], bool)
                    and best[1] in steps_seen):
                raise refuse("best", best, f"[finite score, one of the evaluated steps {steps_seen}]")
            model_state = self.model.state_dict()
            if not isinstance(best_state, dict) or set(best_state) != set(model_state) or any(
                    not isinstance(best_state[n], torch.Tensor) or best_state[n].shape != v.shape
                    for n, v in model_state.items()):
                raise refuse("best_state", best_state, "the model's state dict (same names and shapes)")
        self._check_rng_state(state["rng"], refuse)

    def _check_optimizer_state(self, i: int, u: Update, saved: Any, stage_steps: int, factor: float, refuse) -> None:
        field = f"optimizers[{i}]"
        fresh = self.optimizers[i].state_dict()
        if not isinstance(saved, dict) or set(saved) != {"state", "param_groups"} \
                or not isinstance(saved["param_groups"], list) or len(saved["param_groups"]) != len(fresh["param_groups"]):
            raise refuse(field, saved, f"the state of update {u.name!r}'s optimiser ({len(fresh['param_groups'])} "
                                       "parameter group(s))")
        params = self._per_optimizer[id(self.optimizers[i])][0]
        for g, (got, new) in enumerate(zip(saved["param_groups"], fresh["param_groups"])):
            if not isinstance(got, dict) or got.get("params") != new["params"]:
                raise refuse(f"{field}.param_groups[{g}].params", got.get("params") if isinstance(got, dict) else got,
                             f"parameter indices {new['params']}")
            lr = self.base_lrs[i] * factor * new.get("lr_scale", 1.0)
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

    @staticmethod
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

    def save_checkpoint(self) -> None:
        if self.run_dir is None:
            return
        self._check_parameters_finite()  # never overwrite a finite checkpoint with a broken state
        files.write_torch(self.run_dir / CHECKPOINT, self.state_dict())
        self._saved_step = self.step

    # -- pre-emption ---------------------------------------------------------------------------------------
    def _install_signal_handlers(self):
        import threading

        if not self.handle_signals or threading.current_thread() is not threading.main_thread():
            return None
        old = {}

        def handler(signum, frame):
            self._stop_requested += 1
            if self._stop_requested > 1:  # second signal: leave now; files are atomic, nothing is torn
                signal.signal(signum, signal.SIG_DFL)
                where = (f"{self.run_dir} keeps its last complete checkpoint; rerun to resume from it"
                         if self.run_dir is not None else "nothing was saved")
                raise KeyboardInterrupt(f"second signal ({signal.Signals(signum).name}): stopped at once; {where}.")

        for sig in (signal.SIGTERM, signal.SIGINT):
            old[sig] = signal.signal(sig, handler)
        return old

    @staticmethod
    def _restore_signal_handlers(old) -> None:
        if old:
            for sig, h in old.items():
                signal.signal(sig, h)


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


def in_notebook() -> bool:
    """Whether this process is a Jupyter kernel, where stderr is no terminal but a progress bar is wanted (tqdm.auto
    draws it as a widget there)."""
    ipython = sys.modules.get("IPython")
    get = getattr(ipython, "get_ipython", None)
    shell = get() if callable(get) else None
    return type(shell).__name__ == "ZMQInteractiveShell"


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
    """What :meth:`Trainer.state_dict` records under ``"digests"``: ``tensors`` maps the dotted path of every tensor
    to :func:`tensor_digest`; ``fields`` maps each top-level entry to the SHA-256 of its canonical JSON with tensors
    replaced by a marker (steps, counts, history, RNG words, optimiser settings)."""
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
