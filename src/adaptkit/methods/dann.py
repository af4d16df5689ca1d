"""DANN: domain-adversarial training through a gradient reversal layer (Ganin et al., JMLR 17(59), 2016).

One update per step changes encoder, head and domain discriminator together. The discriminator sees features
through :func:`~adaptkit.losses.grad_reverse`, so one gradient step *lowers* the domain loss in the discriminator
and *raises* it in the encoder; λ_p = weight · (2/(1 + exp(−γp)) − 1) ramps the reversed gradient from 0 at the
start of training (JMLR §5.2.2, γ = 10). The discriminator itself always trains at full strength.

The paper also anneals the learning rate, μ_p = μ₀/(1 + αp)^β (§5.2.2; μ₀ = 0.01, α = 10, β = 0.75, momentum
0.9): that belongs to the run's optimiser, set ``optim.schedule=dann_anneal``.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import List

import torch

from .._checks import check_number, check_widths
from ..data.batches import Batch
from ..losses import domain_bce, grad_reverse, weighted_cross_entropy
from ..nets.discriminators import DomainHead
from ..nets.model import AdaptedModel
from .base import METHODS, Alignment, LossOut, Progress, SetupInfo, Stage, Update, WeightOptions


@METHODS.register("dann")
class DANN(Alignment):
    """encoder+head+discriminator ← CE(source) + BCE(domain) with the gradient reversed (×λ_p) into the encoder."""

    name = "dann"
    reference = "Ganin, Ustinova, Ajakan, Germain, Larochelle, Laviolette, Marchand & Lempitsky, JMLR 17(59), 2016"

    @dataclass
    class Options(WeightOptions):
        weight: float = 1.0  # λ: scale of the reversed gradient (the paper's moons toy, §5.1.1, uses 6)
        weight_schedule: str = "dann_ramp"  # factor on λ over progress p; dann_ramp = 2/(1+exp(−γp))−1 (§5.2.2)
        gamma: float = 10.0  # γ of the dann_ramp schedule (§5.2.2: 10), passed to it by name; unused by others
        disc_hidden: List[int] = field(default_factory=lambda: [64, 64])  # hidden widths (ours; paper: 1024, 1024)

    def validate_options(self) -> None:
        o, owner = self.options, f"method {self.name!r}"
        check_number("gamma", owner, o.gamma, low=0, low_open=True)
        check_widths("disc_hidden", owner, o.disc_hidden)

    def setup(self, model: AdaptedModel, info: SetupInfo) -> None:
        o = self.options
        hidden = check_widths("disc_hidden", f"method {self.name!r}", o.disc_hidden)
        self.discriminator = DomainHead(info.feature_dim, hidden, outputs=1)

    def lambda_at(self, p: float) -> float:
        """λ_p: the factor on the gradient the domain loss sends back into the encoder."""
        return self.weight_at(p)

    def loss(self, batch: Batch, t: Progress) -> LossOut:
        m = self.model
        f_s = m.features(batch.x_src, domain="source")  # (B, F)
        f_t = m.features(batch.x_tgt, domain="target")  # (B, F)
        ce = weighted_cross_entropy(m.head(f_s), batch.y_src, batch.w_src)
        lam = self.lambda_at(t.p)
        d_s = self.discriminator(grad_reverse(f_s, lam))  # (B,)
        d_t = self.discriminator(grad_reverse(f_t, lam))  # (B,)
        dom = domain_bce(d_s, d_t, batch.w_src)
        return ce + dom, {"ce": ce.detach(), "domain": dom.detach(), "lambda": torch.tensor(lam, device=ce.device)}

    def stages(self) -> List[Stage]:
        m = self.model
        return [Stage("train", [Update("adversarial", [m.encoder, m.head, self.discriminator], self.loss)])]
