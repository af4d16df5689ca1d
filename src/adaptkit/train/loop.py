"""The one training loop. It knows nothing about any method: it cycles paired batches, runs the current stage's
updates in order (one optimiser each), applies learning-rate schedules, evaluates, logs and checkpoints.

Read top to bottom: ``Trainer.run`` → ``_step`` → ``_run_update``; evaluation, checkpoint and summary below.
What a checkpoint holds, and how resuming checks it, is in :mod:`adaptkit.train.checkpoint`.
"""
from __future__ import annotations

import contextlib
import copy
import math
import signal
import sys
import time
from pathlib import Path
from typing import Any, Callable, Dict, List, Optional, Tuple

import torch

from ..methods.base import Alignment, Progress, Stage, Update
from ..nets.model import AdaptedModel
from . import files
# the checkpoint code lives in checkpoint.py; its names stay importable from here, where other modules import them
from .checkpoint import (CHECKPOINT_FORMAT, _CHECKPOINT_KEYS, _config_diff, _field_digests,  # noqa: F401
                         _plain_config, _rng_state, _set_rng_state, _skeleton, _tensors, check_checkpoint,
                         check_plausible, checkpoint_digests, load_checkpoint, tensor_digest, verify_digests)
from .optim import OptimSettings, make_optimizer, parameter_groups
from .precision import autocast_for
from .schedules import lr_schedule

CHECKPOINT = "checkpoint.pt"
SUMMARY = "summary.json"
METRICS = "metrics.jsonl"
BEST = "best.pt"


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


def stage_bounds(stages: List[Stage], steps: int) -> List[Tuple[int, int]]:
    """Split ``steps`` between stages in proportion to their ``share``; the last stage takes the remainder."""
    total = sum(s.share for s in stages)
    bounds, start = [], 0
    for i, s in enumerate(stages):
        end = steps if i == len(stages) - 1 else start + int(round(steps * s.share / total))
        bounds.append((start, end))
        start = end
    return bounds


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
        check_plausible(self, state, source)
        try:
            self.batches.load_state_dict(state["batches"])  # checks its positions against the data first
        except (ValueError, TypeError, KeyError, IndexError, RuntimeError) as e:
            raise ValueError(f"{source}: field 'batches' (the batch streams) is refused: {e}") from None
        self.step = state["step"]
        self.stage_index = state["stage_index"]
        if self.stage_index >= 0:
            for o, s in zip(self.optimizers, state["optimizers"]):  # built by check_plausible for this stage
                o.load_state_dict(s)
        _set_rng_state(state["rng"])
        self.history = list(state["history"])
        self._running = {k: list(v.unbind(0)) for k, v in state["running"].items()}
        self.skipped_steps, self.skipped_updates = state["skipped_steps"], state["skipped_updates"]
        self.wall = float(state["wall"])
        self.best = tuple(state["best"]) if state["best"] else None
        self.best_state = state["best_state"]
        self._saved_step = self.step

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


def in_notebook() -> bool:
    """Whether this process is a Jupyter kernel, where stderr is no terminal but a progress bar is wanted (tqdm.auto
    draws it as a widget there)."""
    ipython = sys.modules.get("IPython")
    get = getattr(ipython, "get_ipython", None)
    shell = get() if callable(get) else None
    return type(shell).__name__ == "ZMQInteractiveShell"
