"""MCD: maximum classifier discrepancy (Saito, Watanabe, Ushiku & Harada, CVPR 2018).

Two classifiers on the same encoder: the model's head F1 and a second head F2 that the method owns (the same
architecture, a fresh random initialisation drawn in :meth:`MCD.setup` from the run's seeded generator). Their
discrepancy on a target feature, d(p1, p2) = (1/K) Σ_k |p1_k − p2_k| of the two softmax outputs
(:func:`~adaptkit.losses.l1_discrepancy`), is large for target features that lie outside the support of the
source. Each step runs the paper's three updates on one batch (§3.2; section number from memory):

- **A** — encoder+F1+F2 ← CE_s(F1) + CE_s(F2): both heads and the encoder learn the source;
- **B** — F1+F2 ← CE_s(F1) + CE_s(F2) − weight·d(F1, F2)(target), the encoder fixed: the heads disagree as much
  as they can on target features while staying right on the source;
- **C** — encoder ← weight·d(F1, F2)(target), repeated ``n_generator_steps`` times (the paper: n = 4), the heads
  fixed: the encoder moves target features to where the heads agree.

Predictions (and every score) come from F1, the model's own head (ours: the paper reports F1, F2 and their
ensemble). ``weight`` is ours (the paper: 1).
"""
from __future__ import annotations

import copy
from dataclasses import dataclass
from typing import List

import torch
from torch import nn

from .._checks import check_number
from ..data.batches import Batch
from ..losses import l1_discrepancy, weighted_cross_entropy
from ..nets.model import AdaptedModel
from .base import METHODS, Alignment, LossOut, Progress, SetupInfo, Stage, Update


def _fresh_copy(head: nn.Module) -> nn.Module:
    """A copy of ``head`` with every layer that has ``reset_parameters`` re-initialised (the global generator)."""
    other = copy.deepcopy(head)
    for mod in other.modules():
        if mod is not other and hasattr(mod, "reset_parameters"):
            mod.reset_parameters()
    if hasattr(other, "reset_parameters"):
        other.reset_parameters()
    return other


@METHODS.register("mcd")
class MCD(Alignment):
    """A: encoder+heads ← CE(source); B: heads ← CE(source) − discrepancy(target); C: encoder ← discrepancy ×n."""

    name = "mcd"
    reference = "Saito, Watanabe, Ushiku & Harada, CVPR 2018"

    @dataclass
    class Options:
        n_generator_steps: int = 4  # repeats of step C per batch (the paper's n = 4)
        weight: float = 1.0  # scale of the discrepancy in steps B and C (the paper: 1)

    def validate_options(self) -> None:
        o, owner = self.options, f"method {self.name!r}"
        check_number("n_generator_steps", owner, o.n_generator_steps, low=1, integer=True)
        check_number("weight", owner, o.weight, low=0)

    def setup(self, model: AdaptedModel, info: SetupInfo) -> None:
        self.second_head = _fresh_copy(model.head)
        same = all(torch.equal(a, b) for a, b in zip(model.head.parameters(), self.second_head.parameters()))
        if same:
            raise ValueError(
                f"method {self.name!r} needs a second classifier that starts different from the first; "
                f"re-initialising a copy of the head {type(model.head).__name__} changed none of its parameters "
                "(give its layers a reset_parameters method, as torch's nn.Linear has).")

    def discrepancy(self, f_t: torch.Tensor) -> torch.Tensor:
        """d(F1, F2) on target features ``(B, F)``: mean |p1 − p2| over classes and samples."""
        return l1_discrepancy(self.model.head(f_t), self.second_head(f_t))

    def _source_ce(self, f_s: torch.Tensor, batch: Batch) -> torch.Tensor:
        return (weighted_cross_entropy(self.model.head(f_s), batch.y_src, batch.w_src)
                + weighted_cross_entropy(self.second_head(f_s), batch.y_src, batch.w_src))

    def classify_loss(self, batch: Batch, t: Progress) -> LossOut:
        """Step A: both heads' source CE, into encoder and heads."""
        f_s = self.model.features(batch.x_src, domain="source")  # (B, F)
        return self._source_ce(f_s, batch), {}

    def critic_loss(self, batch: Batch, t: Progress) -> LossOut:
        """Step B: source CE − weight·discrepancy(target), on fixed features."""
        m = self.model
        with torch.no_grad():  # the encoder is not trained by this update
            f_s = m.features(batch.x_src, domain="source")  # (B, F)
            f_t = m.features(batch.x_tgt, domain="target")  # (B, F)
        ce = self._source_ce(f_s, batch)
        disc = self.discrepancy(f_t)
        return ce - self.options.weight * disc, {"ce": ce.detach(), "discrepancy": disc.detach()}

    def generator_loss(self, batch: Batch, t: Progress) -> LossOut:
        """Step C: weight·discrepancy(target), into the encoder."""
        disc = self.discrepancy(self.model.features(batch.x_tgt, domain="target"))
        return self.options.weight * disc, {"discrepancy": disc.detach()}

    def stages(self) -> List[Stage]:
        m = self.model
        return [Stage("train", [
            Update("classify", [m.encoder, m.head, self.second_head], self.classify_loss),
            Update("critic", [m.head, self.second_head], self.critic_loss),
            Update("generator", [m.encoder], self.generator_loss, repeat=int(self.options.n_generator_steps)),
        ])]
