"""Self-training on confident target pseudo-labels, after source pre-training.

Two stages. *pretrain*: encoder and head learn the source task (``pretrain_share`` of the run's steps). *self_train*:
encoder and head minimise

    CE(source) + λ_p · CE(target rows kept, their pseudo-labels)

where a target row's pseudo-label is the current model's argmax prediction on it, taken from the same forward pass
and detached (no gradient flows through the labels), and a row is kept when its confidence max_k p_k is above
``threshold`` (Lee, "Pseudo-Label", ICML 2013 workshop: the most probable class used as a true label; the confidence
threshold as in FixMatch, Sohn et al., NeurIPS 2020, whose default is τ = 0.95 [memory]).
``class_balanced`` keeps at most the same number of rows per predicted class in each batch, the most confident
ones (after the class-balanced selection of CBST, Zou, Yu, Kumar & Wang, ECCV 2018; see
:func:`~adaptkit.losses.select_pseudo_labels`), so that the classes the model already favours on the target do not
take over the pseudo-labels. The defaults — threshold 0.95, class balance on, weight 1 — are ours, chosen on tuning
seeds by ``benchmarks/defaults.py`` (benchmarks/RESULTS.md, "Defaults that are ours"; before: 0.9, off, 1).
λ_p = ``weight`` × ``weight_schedule`` over the self-training stage (Lee's α(t) ramps up; ``dann_ramp`` does so
here). The share of target rows kept is logged as ``self_train/kept``.

The pre-training stage makes the first pseudo-labels those of a source-only model, as both papers start from a
model that already classifies. The pseudo-labels come from the model in training mode (with its dropout, if any),
as in Lee (2013); FixMatch's weak/strong augmentation pair is not part of this method.

``teacher="ema"`` takes the pseudo-labels from a momentum-averaged copy of the model instead (the "mean teacher" of
Tarvainen & Valpola, NeurIPS 2017, §2: θ'_t = α·θ'_{t−1} + (1 − α)·θ_t, the teacher's weights an exponential moving
average of the student's after each step; their decay α = 0.99 early in training and 0.999 later [memory]; our
default 0.99, as a self-training stage here is a few hundred steps). The teacher starts as a copy of the model when
self-training begins; before each self-training step it moves one EMA step towards the model (whose weights are then
those after the previous step, so the teacher of step t averages the model's weights of steps ≤ t − 1, as in the
paper), and it predicts in the model's current mode. Its weights are buffers, not parameters: no gradient and no
optimiser ever reaches them, and a checkpoint holds them. Buffers of the network (batch-norm statistics) are copied
from the model, not averaged (ours).
"""
from __future__ import annotations

import copy
from dataclasses import dataclass
from typing import List

import torch
from torch import nn

from .._checks import check_choice, check_number
from ..data.batches import Batch
from ..losses import pseudo_label_loss, weighted_cross_entropy
from ..nets.model import AdaptedModel
from ..nets.modes import module_mode
from .base import METHODS, Alignment, LossOut, Progress, SetupInfo, Stage, Update, WeightOptions

TEACHERS = ("current", "ema")


def _weights_as_buffers(module: nn.Module) -> nn.Module:
    """``module`` with each parameter turned into a buffer of the same name (a detached copy): it computes the same
    function, but autograd and optimisers do not see its weights. Returns ``module``."""
    for m in module.modules():
        for name, p in list(m._parameters.items()):
            if p is not None:
                del m._parameters[name]
                m.register_buffer(name, p.detach().clone())
    return module


@METHODS.register("self_training")
class SelfTraining(Alignment):
    """pretrain: encoder+head ← CE(source). self_train: encoder+head ← CE(source) + λ·CE(confident target rows)."""

    name = "self_training"
    reference = ("Lee, ICML 2013 workshop (pseudo-labels); Sohn et al., NeurIPS 2020 (threshold); "
                 "Zou, Yu, Kumar & Wang, ECCV 2018 (class balance)")

    @dataclass
    class Options(WeightOptions):
        pretrain_share: float = 0.5  # share of the run's steps spent on source alone, in (0, 1) (ours)
        threshold: float = 0.95  # keep a target row when its max class probability is above this, in [0, 1]
        class_balanced: bool = True  # at most the same number of kept rows per predicted class in a batch (CBST)
        teacher: str = "current"  # who gives the pseudo-labels: "current" (the model) or "ema" (mean teacher)
        teacher_decay: float = 0.99  # α of the EMA teacher, in [0, 1) (Tarvainen & Valpola 2017: 0.99, 0.999)

    def validate_options(self) -> None:
        o, owner = self.options, f"method {self.name!r}"
        check_number("pretrain_share", owner, o.pretrain_share, low=0, high=1, low_open=True, high_open=True)
        check_number("threshold", owner, o.threshold, low=0, high=1)
        if not isinstance(o.class_balanced, bool):
            raise TypeError(f"The 'class_balanced' parameter of {owner} must be true or false. "
                            f"Got {o.class_balanced!r} instead.")
        check_choice("teacher", owner, o.teacher, TEACHERS)
        check_number("teacher_decay", owner, o.teacher_decay, low=0, high=1, high_open=True)

    def setup(self, model: AdaptedModel, info: SetupInfo) -> None:
        if self.options.teacher == "ema":  # registered now, so every state dict has its keys from setup on
            self.teacher = _weights_as_buffers(nn.Sequential(copy.deepcopy(model.target_encoder),
                                                             copy.deepcopy(model.head)))

    def _student(self) -> nn.Module:
        return nn.Sequential(self.model.target_encoder, self.model.head)  # same order of tensors as the teacher

    def on_stage_start(self, stage: Stage) -> None:
        if stage.name == "self_train" and self.options.teacher == "ema":
            self.teacher.load_state_dict(self._student().state_dict())  # θ'_0 = θ_0: the pre-trained model

    @torch.no_grad()
    def update_teacher(self) -> None:
        """θ' ← α·θ' + (1 − α)·θ for every weight; the network's buffers copied from the model."""
        a = float(self.options.teacher_decay)
        student = self._student()
        weights = {n for n, _ in student.named_parameters()}
        theirs = dict(student.state_dict())
        for n, t in self.teacher.state_dict().items():  # state_dict tensors share storage with the buffers
            if n in weights:
                t.mul_(a).add_(theirs[n], alpha=1.0 - a)
            else:
                t.copy_(theirs[n])

    def pseudo_loss(self, batch: Batch) -> LossOut:
        """CE of the target logits against confident, detached pseudo-labels (the model's own, or the EMA
        teacher's), and the share kept."""
        o = self.options
        logits = self.model(batch.x_tgt, domain="target")  # (B, K)
        if o.teacher == "current":
            return pseudo_label_loss(logits, o.threshold, o.class_balanced)
        self.update_teacher()
        with module_mode(self.teacher, train=self.model.training, no_grad=True):
            probs = torch.softmax(self.teacher(batch.x_tgt), dim=1)  # (B, K)
        return pseudo_label_loss(logits, o.threshold, o.class_balanced, probs=probs)

    def loss(self, batch: Batch, t: Progress) -> LossOut:
        m = self.model
        ce = weighted_cross_entropy(m(batch.x_src, domain="source"), batch.y_src, batch.w_src)
        pseudo, kept = self.pseudo_loss(batch)
        value = ce + self.weight_at(t.p) * pseudo if bool(kept > 0) else ce  # no row kept: source CE exactly
        return value, {"ce": ce.detach(), "pseudo": pseudo.detach(), "kept": kept}

    def stages(self) -> List[Stage]:
        m, o = self.model, self.options
        return [
            Stage("pretrain", [Update("classify", [m.encoder, m.head], self.source_loss)], share=o.pretrain_share),
            Stage("self_train", [Update("self_train", [m.encoder, m.head], self.loss)], share=1.0 - o.pretrain_share),
        ]
