"""Self-training on confident target pseudo-labels, after source pre-training.

Two stages. *pretrain*: encoder and head learn the source task (``pretrain_share`` of the run's steps). *self_train*:
encoder and head minimise

    CE(source) + λ_p · CE(target rows kept, their pseudo-labels)

where a target row's pseudo-label is the current model's argmax prediction on it, taken from the same forward pass
and detached (no gradient flows through the labels), and a row is kept when its confidence max_k p_k is above
``threshold`` (Lee, "Pseudo-Label", ICML 2013 workshop: the most probable class used as a true label; the confidence
threshold as in FixMatch, Sohn et al., NeurIPS 2020, whose default is τ = 0.95 [memory]; our default 0.9).
``class_balanced`` keeps at most the same number of rows per predicted class in each batch, the most confident
ones (after the class-balanced selection of CBST, Zou, Yu, Kumar & Wang, ECCV 2018; see
:func:`~adaptkit.losses.select_pseudo_labels`), so that the classes the model already favours on the target do not
take over the pseudo-labels. λ_p = ``weight`` × ``weight_schedule`` over the self-training stage (Lee's α(t) ramps
up; ``dann_ramp`` does so here). The share of target rows kept is logged as ``self_train/kept``.

The pre-training stage makes the first pseudo-labels those of a source-only model, as both papers start from a
model that already classifies. The pseudo-labels come from the model in training mode (with its dropout, if any),
as in Lee (2013); FixMatch's weak/strong augmentation pair is not part of this method.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import List

from .._checks import check_number
from ..data.batches import Batch
from ..losses import pseudo_label_loss, weighted_cross_entropy
from .base import METHODS, Alignment, LossOut, Progress, Stage, Update, WeightOptions


@METHODS.register("self_training")
class SelfTraining(Alignment):
    """pretrain: encoder+head ← CE(source). self_train: encoder+head ← CE(source) + λ·CE(confident target rows)."""

    name = "self_training"
    reference = ("Lee, ICML 2013 workshop (pseudo-labels); Sohn et al., NeurIPS 2020 (threshold); "
                 "Zou, Yu, Kumar & Wang, ECCV 2018 (class balance)")

    @dataclass
    class Options(WeightOptions):
        pretrain_share: float = 0.5  # share of the run's steps spent on source alone, in (0, 1) (ours)
        threshold: float = 0.9  # keep a target row when its max class probability is above this, in [0, 1] (ours)
        class_balanced: bool = False  # at most the same number of kept rows per predicted class in a batch (CBST)

    def validate_options(self) -> None:
        o, owner = self.options, f"method {self.name!r}"
        check_number("pretrain_share", owner, o.pretrain_share, low=0, high=1, low_open=True, high_open=True)
        check_number("threshold", owner, o.threshold, low=0, high=1)
        if not isinstance(o.class_balanced, bool):
            raise TypeError(f"The 'class_balanced' parameter of {owner} must be true or false. "
                            f"Got {o.class_balanced!r} instead.")

    def pseudo_loss(self, batch: Batch) -> LossOut:
        """CE of the target logits against their own confident, detached pseudo-labels, and the share kept."""
        logits = self.model(batch.x_tgt, domain="target")  # (B, K)
        return pseudo_label_loss(logits, self.options.threshold, self.options.class_balanced)

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
