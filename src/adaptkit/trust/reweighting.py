"""Class weights re-estimated while the run trains (``class_weights=reestimated``).

``class_weights=estimated`` fixes the per-class source weights once, from a source-trained model, before training.
Importance-weighted domain adversarial networks (Combes, Zhao, Wang & Gordon, NeurIPS 2020 [memory]) instead
re-estimate them as training goes, from the model being trained: its confusion matrix on labelled source data and
its mean prediction on the target give w = C⁻¹ μ (the BBSE estimate of Lipton, Wang & Smola, ICML 2018), and the
alignment weighted by w keeps that estimate consistent while the features move. Here:

- training starts with equal weights (1 for every class): a weak estimate before training can only mislead, and
  one that gives a class weight 0 would remove it from the source loss for good (on rotated moons with a label
  shift, the reference black box of :mod:`.reference` gave class 1 weight 0 and the run never predicted it);
- at every evaluation (every ``eval_every`` steps, in eval mode, so dropout is off) the current model's hard BBSE
  estimate on source validation and the target training inputs is computed, projected onto the simplex and capped
  like every other estimate (:func:`adaptkit.trust.label_shift.bbse`), and the weights move halfway towards it
  (:data:`MOMENTUM`, ours) — a moving average, as the paper smooths its estimates — and none falls below
  :data:`MIN_RATIO` (ours);
- when BBSE cannot be computed (a class never predicted on source validation: a singular confusion matrix), EM
  prior re-estimation on calibrated probabilities is used instead; when neither can, the weights are kept (``class_ratio/updated`` is 0 in that evaluation's record) and :attr:`Reestimating.notes`
  says why;
- the weights in use are part of the batch state, so a resumed run continues with them bit-identically, and each
  evaluation record carries them (``class_ratio/<k>``), so ``metrics.jsonl`` shows how they moved.

Nothing computed from target labels reaches the weights: only source labels and target *inputs* are used.
"""
from __future__ import annotations

import dataclasses
from typing import Any, Dict, Optional

import numpy as np
import torch

from ..data.batches import Batch
from .label_shift import bbse, calibrate, em_priors

__all__ = ["MIN_RATIO", "MOMENTUM", "ReweightedBatches", "Reestimating"]

MOMENTUM = 0.5  # ours: the share of the new estimate in the weights at each evaluation
#: ours: no class's weight falls below this. A class at weight 0 leaves the source loss, the model stops
#: predicting it, its confusion-matrix row is empty and no later estimate could bring it back.
MIN_RATIO = 0.05


class ReweightedBatches:
    """Any paired-batch source (``next``, ``state_dict``, ``load_state_dict``) with each source sample's weight
    multiplied by its class's current ratio; the ratios are part of the state."""

    def __init__(self, inner, ratios):
        self.inner = inner
        r = np.asarray(ratios, dtype=np.float64)
        if r.ndim != 1 or not np.isfinite(r).all() or (r < 0).any():
            raise ValueError(f"class ratios must be finite and non-negative, one per class; got {r.tolist()}")
        self.set_ratios(r)

    def set_ratios(self, ratios) -> None:
        self.ratios = torch.as_tensor(np.asarray(ratios, dtype=np.float32))  # (K,), on the CPU
        self._on: Dict[torch.device, torch.Tensor] = {}

    def next(self) -> Batch:
        b = self.inner.next()
        dev = b.y_src.device
        if dev not in self._on:
            self._on[dev] = self.ratios.to(dev)
        r = self._on[dev][b.y_src]
        return dataclasses.replace(b, w_src=r if b.w_src is None else b.w_src * r)

    def state_dict(self) -> dict:
        return {"inner": self.inner.state_dict(), "ratios": self.ratios.clone()}

    def close(self) -> None:
        """End the inner source's workers, if it has any (a DataLoader's)."""
        getattr(self.inner, "close", lambda: None)()

    def load_state_dict(self, s: dict) -> None:
        if not isinstance(s, dict) or set(s) != {"inner", "ratios"}:
            raise ValueError(f"the re-weighted batch state must be a dict with 'inner' and 'ratios'; got "
                             f"{sorted(s) if isinstance(s, dict) else type(s).__name__}")
        r = s["ratios"]
        k = self.ratios.numel()
        if not (isinstance(r, torch.Tensor) and r.shape == (k,) and bool(torch.isfinite(r).all())
                and bool((r >= 0).all())):
            shown = f"a tensor of shape {tuple(r.shape)}" if isinstance(r, torch.Tensor) else repr(r)
            raise ValueError(f"'ratios' is {shown}; accepted: {k} finite non-negative class ratios")
        self.inner.load_state_dict(s["inner"])
        self.set_ratios(r.numpy())


class Reestimating:
    """An evaluator (``model -> {metric: value}``) that also re-estimates the class ratios of ``batches`` from the
    model it evaluates (see the module docstring)."""

    def __init__(self, inner, batches: ReweightedBatches, source_val, target_x: torch.Tensor, device,
                 momentum: float = MOMENTUM, batch_size: int = 1024, max_target: int = 5000):
        self.inner, self.batches, self.device = inner, batches, device
        self.source_val, self.target_x = source_val, target_x[:max_target]
        self.momentum, self.batch_size = momentum, batch_size
        self.notes: list = []  # why an evaluation kept the weights (each reason once)

    def _probs(self, model, x: torch.Tensor, domain: str) -> np.ndarray:
        from ..train.evaluate import model_outputs

        chunks = ((x[i:i + self.batch_size], None) for i in range(0, len(x), self.batch_size))
        return model_outputs(model, chunks, domain, self.device)[1].double().numpy()

    def estimate(self, model) -> Dict[str, Any]:
        """``{"ratios": …}`` from ``model``'s hard BBSE estimate — or, when its confusion matrix is singular (a
        class never predicted on source validation), from EM prior re-estimation on calibrated probabilities
        (Saerens, Latinne & Decaestecker, 2002), which needs no inverse — or ``{"error": why}``."""
        ps, y = self._probs(model, self.source_val.x, "source"), self.source_val.y.numpy()
        pt = self._probs(model, self.target_x, "target")
        try:
            out = bbse(ps, y, pt)
        except ValueError as e:
            if "singular" not in str(e):
                return {"error": str(e)}
            try:
                out = em_priors(calibrate(ps, y)(pt), np.bincount(y, minlength=ps.shape[1]) / len(y))
            except ValueError as e2:
                return {"error": f"{e}; EM: {e2}"}
        return {"ratios": out["proportions"] / out["source_proportions"]}

    def __call__(self, model) -> Dict[str, Optional[float]]:
        out = dict(self.inner(model))
        est = self.estimate(model)
        old = self.batches.ratios.double().numpy()
        if "error" in est:
            note = f"class weights kept at an evaluation: {est['error']}"
            if note not in self.notes:
                self.notes.append(note)
        else:
            new = (1 - self.momentum) * old + self.momentum * np.asarray(est["ratios"])
            self.batches.set_ratios(np.maximum(new, MIN_RATIO))
        out["class_ratio/updated"] = float("error" not in est)
        out.update({f"class_ratio/{k}": float(v) for k, v in enumerate(self.batches.ratios.tolist())})
        return out
