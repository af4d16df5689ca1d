"""The one training loop. It knows nothing about any method: it cycles paired batches, runs the current stage's
updates in order (one optimiser each), applies learning-rate schedules, evaluates, logs and checkpoints.

Read top to bottom: ``Trainer.run`` → ``_step`` → ``_run_update``; evaluation, checkpoint and summary below.
"""
from __future__ import annotations

import copy
import hashlib
import json
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
from . import files
from .optim import OptimSettings, make_optimizer
from .schedules import get_schedule

CHECKPOINT = "checkpoint.pt"
SUMMARY = "summary.json"
METRICS = "metrics.jsonl"
BEST = "best.pt"
CHECKPOINT_FORMAT = 1
_CHECKPOINT_KEYS = ("config_hash", "step", "stage_index", "model", "method", "optimizers", "batches", "rng",
                    "history", "skipped", "wall", "best", "best_state")


class DivergenceError(RuntimeError):
    """A loss or parameter became NaN/inf. The message names the update and step; the run folder keeps the last
    finite checkpoint."""


class Interrupted(RuntimeError):
    """SIGTERM/SIGINT arrived: a checkpoint was written at the step boundary and the run can be resumed.

    A second signal while that step finishes raises ``KeyboardInterrupt`` at once instead; every file in the run
    folder is written atomically, so the folder still holds the previous checkpoint, loadable and resumable."""


_RUN_MANAGEMENT = {"run_dir", "overwrite", "progress", "device", "checkpoint_every"}  # not part of a run's numbers


def _all_finite(loss: torch.Tensor, grads: List[torch.Tensor]) -> bool:
    """Whether the loss and every gradient entry are finite: per-tensor norms (fused where torch offers it) are
    non-finite when any entry is, and so is their sum. One device sync."""
    tensors = [loss.detach().reshape(1), *grads]
    norms = torch._foreach_norm(tensors) if hasattr(torch, "_foreach_norm") else [t.norm() for t in tensors]
    return math.isfinite(float(torch.stack(norms).sum()))


def config_hash(config: Dict[str, Any]) -> str:
    """A short digest of everything that determines a run's numbers (run-management keys excluded)."""
    blob = json.dumps({k: v for k, v in config.items() if k not in _RUN_MANAGEMENT}, sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


def _plain_config(config: Any) -> Any:
    """The config as JSON types (what ``weights_only`` loading accepts), or None."""
    return None if config is None else json.loads(json.dumps(config, sort_keys=True, default=str))


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
        on_nonfinite: ``"stop"`` raises :class:`DivergenceError`; ``"skip"`` skips the update and counts it.
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
    """

    def __init__(self, model: AdaptedModel, method: Alignment, batches, *, steps: int, optim: OptimSettings,
                 evaluate: Callable[[AdaptedModel], Dict[str, Any]], eval_every: int = 100,
                 checkpoint_every: int = 0, run_dir: Optional[Path] = None, progress: Optional[bool] = None,
                 meta: Optional[Dict[str, Any]] = None, select: Optional[Tuple[str, bool]] = None,
                 on_nonfinite: str = "stop", handle_signals: bool = True, check_gradients: bool = True):
        self.model, self.method, self.batches = model, method, batches
        self.steps, self.optim, self.evaluate = steps, optim, evaluate
        self.eval_every, self.checkpoint_every = max(1, eval_every), checkpoint_every
        self.run_dir = Path(run_dir) if run_dir is not None else None
        self.progress, self.meta, self.select = progress, dict(meta or {}), select
        self.on_nonfinite, self.handle_signals = on_nonfinite, handle_signals
        self.check_gradients = check_gradients
        self.stages = method.stages()
        if not self.stages:
            raise ValueError(f"method {method.name!r} declared no stages")
        self.bounds = stage_bounds(self.stages, steps)
        self.lr_factor = get_schedule(optim.schedule, "optim")
        # training state (everything below goes into a checkpoint)
        self.step = 0
        self.stage_index = -1  # the stage whose on_stage_start has run
        self.optimizers: List[torch.optim.Optimizer] = []
        self.base_lrs: List[float] = []
        self.history: List[Dict[str, Any]] = []
        self.skipped = 0
        self.wall = 0.0
        self.best: Optional[Tuple[float, int]] = None  # (score, step)
        self.best_state: Optional[Dict[str, Any]] = None
        self._running: Dict[str, List[torch.Tensor]] = {}
        self._stop_requested = 0
        self._saved_step: Optional[int] = None  # the step of the checkpoint on disk, when this process knows it

    # -- the loop ------------------------------------------------------------------------------------------
    def run(self) -> Dict[str, Any]:
        from tqdm.auto import tqdm

        show = self.progress if self.progress is not None else sys.stderr.isatty()
        bar = tqdm(total=self.steps, initial=self.step, disable=not show, desc=self.meta.get("method", "train"),
                   dynamic_ncols=True, leave=False)
        old_handlers = self._install_signal_handlers()
        if self.run_dir is not None:
            files.remove_temporaries(self.run_dir)  # left by a process killed between a write and its rename
        t0 = time.perf_counter()
        try:
            while self.step < self.steps:
                self._enter_stage_for(self.step)
                self._step()
                self.step += 1
                bar.update(1)
                if self.step % self.eval_every == 0 or self.step == self.steps:
                    self.wall += time.perf_counter() - t0
                    t0 = time.perf_counter()
                    self._evaluate_and_log()
                    bar.set_postfix({k: f"{v:.3f}" for k, v in self.history[-1].items()
                                     if k.endswith("accuracy") and isinstance(v, float)}, refresh=False)
                if self.checkpoint_every and self.step % self.checkpoint_every == 0 and self.step < self.steps:
                    self.wall += time.perf_counter() - t0
                    t0 = time.perf_counter()
                    self.save_checkpoint()
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
        self.optimizers, self.base_lrs = [], []
        for u in stage.updates:
            s = self.optim.with_overrides(u.optimizer, f"update {u.name!r} of method {self.method.name!r}")
            params = u.parameters()
            if not params:
                raise ValueError(f"update {u.name!r} of method {self.method.name!r} declares no trainable parameters")
            self.optimizers.append(make_optimizer(params, s))
            self.base_lrs.append(s.lr)

    def _step(self) -> None:
        a, b = self.bounds[self.stage_index]
        stage = self.stages[self.stage_index]
        t = Progress(step=self.step, stage=stage.name, stage_step=self.step - a, p=(self.step - a) / max(1, b - a))
        factor = self.lr_factor(t.p)
        batch = self.batches.next()
        for u, opt, lr in zip(stage.updates, self.optimizers, self.base_lrs):
            if opt.param_groups[0]["lr"] != lr * factor:
                for group in opt.param_groups:
                    group["lr"] = lr * factor
            for _ in range(u.repeat):
                self._run_update(u, opt, batch, t)

    def _run_update(self, u: Update, opt: torch.optim.Optimizer, batch, t: Progress) -> None:
        opt.zero_grad(set_to_none=True)
        out = u.loss(batch, t)
        loss, logs = (out if isinstance(out, tuple) else (out, {}))
        loss.backward()
        # One check, one device sync per update, *before* the step is applied: a NaN/inf loss or gradient leaves
        # the parameters untouched. (A step that overflows finite gradients is caught at the next evaluation or
        # checkpoint, which check every parameter.)
        if self.check_gradients:
            grads = [p.grad for g in opt.param_groups for p in g["params"] if p.grad is not None]
            finite = _all_finite(loss, grads)
        else:
            finite = math.isfinite(float(loss.detach()))
        if not finite:
            self._nonfinite(u, opt, t, loss)
            return
        opt.step()
        acc = self._running
        acc.setdefault(f"loss/{u.name}", []).append(loss.detach())
        for k, v in logs.items():
            acc.setdefault(f"{u.name}/{k}", []).append(v.detach() if isinstance(v, torch.Tensor) else torch.tensor(v))

    def _nonfinite(self, u: Update, opt: torch.optim.Optimizer, t: Progress, loss: torch.Tensor) -> None:
        if self.on_nonfinite == "skip":
            self.skipped += 1
            opt.zero_grad(set_to_none=True)
            return
        if torch.isfinite(loss.detach()):
            names = {id(p): n for n, p in self.model.named_parameters()}
            names.update({id(p): f"method.{n}" for n, p in self.method.named_parameters()})
            bad = [names.get(id(p), "?") for g in opt.param_groups for p in g["params"]
                   if p.grad is not None and not torch.isfinite(p.grad).all()]
            raise DivergenceError(self._divergence_message(u, t, None, bad))
        raise DivergenceError(self._divergence_message(u, t, float(loss.detach())))

    def _divergence_message(self, u: Update, t: Progress, value: Optional[float], bad_params=()) -> str:
        last = next((h for h in reversed(self.history)), None)
        finite = {k: v for k, v in (last or {}).items() if k.startswith("loss/")}
        if self.run_dir is not None and (self.run_dir / CHECKPOINT).exists():
            at = f" (saved after {self._saved_step} completed steps)" if self._saved_step is not None else ""
            kept = f"the last finite checkpoint{at} is kept in {self.run_dir / CHECKPOINT}"
        else:
            kept = "no checkpoint was written yet"
        if bad_params:
            what = f"produced non-finite gradients for parameter(s) {', '.join(bad_params)} (step not applied)"
            advice = ("Lower the learning rate or the alignment weight, or pass on_nonfinite='skip' to skip such "
                      "steps.")
        else:
            what = f"produced a non-finite loss ({value})"
            advice = ("Lower the learning rate or the alignment weight, or pass on_nonfinite='skip' to skip such "
                      "steps.")
        return (f"method {self.method.name!r}: update {u.name!r} in stage {t.stage!r} {what} at step {t.step}. "
                f"Last finite losses (step {last['step'] if last else '-'}): {finite or 'none recorded'}; {kept}. "
                + advice)

    # -- evaluation and logging ----------------------------------------------------------------------------
    def _evaluate_and_log(self) -> None:
        record: Dict[str, Any] = {"step": self.step, "stage": self.stages[self.stage_index].name}
        for k, vals in self._running.items():
            record[k] = float(torch.stack([v.to(vals[-1].device) for v in vals]).mean())  # resumed ones: CPU
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

    def _check_parameters_finite(self) -> None:
        for name, p in list(self.model.named_parameters()) + list(self.method.named_parameters()):
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
            "skipped_steps": self.skipped,
            "source_val_accuracy": chosen.get("source_val_accuracy"),
            "target_accuracy": chosen.get("target_accuracy"),
            "selected_by": self.select[0] if self.select else "last",
            "selected_step": chosen.get("step"),
            "final": last,
        })
        return s

    # -- checkpoints ---------------------------------------------------------------------------------------
    def state_dict(self) -> Dict[str, Any]:
        return {
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
            "skipped": self.skipped,
            "wall": self.wall,
            "best": list(self.best) if self.best else None,
            "best_state": self.best_state,
        }

    def load_state_dict(self, state: Dict[str, Any], source: str = "checkpoint") -> None:
        if not isinstance(state, dict) or state.get("format") != CHECKPOINT_FORMAT:
            got = f"format {state.get('format')!r}" if isinstance(state, dict) else f"a {type(state).__name__}"
            raise ValueError(f"{source} is not an adaptkit checkpoint of format {CHECKPOINT_FORMAT}; got {got}.")
        missing = [k for k in _CHECKPOINT_KEYS if k not in state]
        if missing:
            raise ValueError(f"{source} lacks the checkpoint entries {missing}; it is damaged or was not written "
                             "by adaptkit.")
        want = self.meta.get("config_hash")
        if state.get("config_hash") != want:
            old, new = state.get("config"), _plain_config(self.meta.get("config"))
            diff = []
            if isinstance(old, dict) and isinstance(new, dict):
                diff = _config_diff({k: v for k, v in old.items() if k not in _RUN_MANAGEMENT},
                                    {k: v for k, v in new.items() if k not in _RUN_MANAGEMENT})
            named = f" ({'; '.join(diff[:8])})" if diff else ""
            raise ValueError(f"{source} was written by a run with config hash {state.get('config_hash')!r}, but this "
                             f"run's config hashes to {want!r}: the settings differ{named}. Use the original settings "
                             "or another run folder.")
        try:
            self.model.load_state_dict(state["model"])
            self.method.load_state_dict(state["method"])
        except RuntimeError as e:
            raise ValueError(f"{source} does not fit this model/method: {e}") from None
        self.step = int(state["step"])
        self.stage_index = int(state["stage_index"])
        if self.stage_index >= 0:
            self._build_optimizers()
            if len(state["optimizers"]) != len(self.optimizers):
                raise ValueError(f"{source} holds {len(state['optimizers'])} optimiser state(s), but stage "
                                 f"{self.stages[self.stage_index].name!r} of method {self.method.name!r} has "
                                 f"{len(self.optimizers)} update(s).")
            for o, s in zip(self.optimizers, state["optimizers"]):
                o.load_state_dict(s)
        self.batches.load_state_dict(state["batches"])
        _set_rng_state(state["rng"])
        self.history = list(state["history"])
        self._running = {k: list(v.unbind(0)) for k, v in state.get("running", {}).items()}
        self.skipped = int(state["skipped"])
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


def load_checkpoint(path) -> Dict[str, Any]:
    """Load a checkpoint without running code from it (``weights_only=True``)."""
    try:
        return torch.load(path, map_location="cpu", weights_only=True)
    except Exception as e:  # pickle.UnpicklingError and friends: name the file and the reason
        raise ValueError(f"refusing to load {path}: it is not a plain-tensor checkpoint ({type(e).__name__}: "
                         f"{str(e).splitlines()[0] if str(e) else ''}).") from None
