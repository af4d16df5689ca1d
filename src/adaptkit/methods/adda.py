"""ADDA: adversarial discriminative domain adaptation (Tzeng, Hoffman, Saenko & Darrell, CVPR 2017).

Two stages. *pretrain*: the source encoder M_s and the head learn the source task. *adapt*: an unshared target
encoder M_t, initialised from M_s, is trained like a GAN generator — a discriminator D learns source features
(from the frozen M_s, label 1) versus target features (from M_t, label 0), and M_t minimises the GAN loss with
inverted labels so its target features look like source features to D. The head is reused unchanged on M_t's
features; M_s and the head are in no adapt update, so they stay exactly as pretraining left them.

The model owns both encoders: :meth:`setup` asks it to unshare the target encoder
(:meth:`~adaptkit.nets.AdaptedModel.unshare_target_encoder`, so every checkpoint has the same state-dict keys), and
the adapt stage starts with :meth:`~adaptkit.nets.AdaptedModel.start_target_encoder`, which copies M_s's weights into
M_t and only then switches ``model(x)`` (target predictions) to it: target scores logged during pretraining are
those of the source encoder.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import List

import torch

from .._checks import check_number, check_widths
from ..data.batches import Batch
from ..losses import domain_bce, inverted_label_loss
from ..nets.discriminators import DomainHead
from ..nets.model import AdaptedModel
from ..nets.modes import module_mode
from .base import METHODS, Alignment, LossOut, Progress, SetupInfo, Stage, Update


@METHODS.register("adda")
class ADDA(Alignment):
    """pretrain: encoder+head ← CE(source). adapt: discriminator ← GAN loss; target encoder ← inverted GAN loss."""

    name = "adda"
    reference = "Tzeng, Hoffman, Saenko & Darrell, CVPR 2017"

    @dataclass
    class Options:
        pretrain_share: float = 0.5  # share of the run's steps spent pretraining on source, in (0, 1)
        disc_hidden: List[int] = field(default_factory=lambda: [64, 64])  # discriminator widths; ours (paper: 500, 500)
        adapt_lr: float = 0.0002  # Adam learning rate of both adapt updates (ADDA's 2e-4; [memory], unverified)
        adapt_betas: List[float] = field(default_factory=lambda: [0.5, 0.999])  # Adam betas there ([memory])

    def validate_options(self) -> None:
        o, owner = self.options, f"method {self.name!r}"
        check_number("pretrain_share", owner, o.pretrain_share, low=0, high=1, low_open=True, high_open=True)
        check_widths("disc_hidden", owner, o.disc_hidden)
        check_number("adapt_lr", owner, o.adapt_lr, low=0, low_open=True)
        betas = list(o.adapt_betas) if hasattr(o.adapt_betas, "__iter__") else None
        if betas is None or len(betas) != 2:
            raise ValueError(f"The 'adapt_betas' parameter of {owner} must be a list of two numbers in [0, 1). "
                             f"Got {o.adapt_betas!r} instead.")
        for b in betas:
            check_number("adapt_betas", owner, b, low=0, high=1, high_open=True)

    def setup(self, model: AdaptedModel, info: SetupInfo) -> None:
        hidden = check_widths("disc_hidden", f"method {self.name!r}", self.options.disc_hidden)
        self.discriminator = DomainHead(info.feature_dim, hidden, outputs=1)
        model.unshare_target_encoder()  # M_t, registered now; its weights are set when "adapt" starts

    def on_stage_start(self, stage: Stage) -> None:
        if stage.name == "adapt":
            self.model.start_target_encoder()  # M_t ← M_s; from now on target data go through M_t

    def discriminator_loss(self, batch: Batch, t: Progress) -> LossOut:
        m = self.model
        with module_mode(m.source_encoder, train=False, no_grad=True):  # frozen: not even batch-norm statistics
            f_s = m.source_encoder(batch.x_src)  # (B, F) from M_s
        with torch.no_grad():
            f_t = m.target_encoder(batch.x_tgt)  # (B, F) from M_t, not trained by this update
        d_s, d_t = self.discriminator(f_s), self.discriminator(f_t)  # (B,), (B,)
        loss = domain_bce(d_s, d_t, batch.w_src)
        acc = 0.5 * ((d_s > 0).float().mean() + (d_t <= 0).float().mean())
        return loss, {"disc_acc": acc}

    def target_encoder_loss(self, batch: Batch, t: Progress) -> LossOut:
        f_t = self.model.target_encoder(batch.x_tgt)  # (B, F)
        return inverted_label_loss(self.discriminator(f_t)), {}

    def stages(self) -> List[Stage]:
        m, o = self.model, self.options
        adam = {"name": "adam", "lr": o.adapt_lr, "betas": [float(b) for b in o.adapt_betas]}
        return [
            Stage("pretrain", [Update("classify", [m.source_encoder, m.head], self.source_loss)],
                  share=o.pretrain_share),
            Stage("adapt", [
                Update("discriminator", [self.discriminator], self.discriminator_loss, optimizer=dict(adam)),
                Update("target_encoder", [m.target_encoder], self.target_encoder_loss, optimizer=dict(adam)),
            ], share=1.0 - o.pretrain_share),
        ]
