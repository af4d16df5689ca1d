"""CDAN: conditional adversarial domain adaptation (Long, Cao, Wang & Jordan, NeurIPS 2018).

DANN's adversarial game with the discriminator conditioned on the classifier's predictions: it sees the multilinear
map T(h) = f ⊗ g of each sample's features f and class probabilities g = softmax(head(f))
(:func:`~adaptkit.losses.multilinear_map`), or, when F·K exceeds ``max_map_size`` (the paper: 4096), the
randomised map (R_f f) ⊙ (R_g g)/√d with fixed random matrices of ``random_dim`` rows (the paper: d = 1024;
:func:`~adaptkit.losses.randomized_multilinear_map`). The matrices are drawn once in :meth:`CDAN.setup` from the
run's seeded generator and kept as buffers, so a checkpoint restores them.

One update per step changes encoder, head and discriminator together, as in DANN: the discriminator minimises the
domain loss; the map's output passes through the gradient reversal layer, so the encoder maximises it, with the
reversed gradient scaled by λ_p = weight · (2/(1 + exp(−γp)) − 1) (DANN's ramp, which the paper reuses [memory]).

``entropy_weighting`` gives CDAN+E: each sample's domain loss is weighted by 1 + e^(−H(g)), the weights normalised
within each domain, so confident predictions count more (times the source class weights ``w_src`` when set). The
weights are treated as constants (no gradient flows through them: ours).

Choices of ours: g enters the map detached unless ``grad_through_predictions`` is set, so the reversed gradient
reaches the classifier only through the features and the head is trained by the source CE alone; the
discriminator's hidden widths default to DANN's here (the paper: 1024, 1024).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import List

import torch
import torch.nn.functional as F

from .._checks import check_number, check_widths
from ..data.batches import Batch
from ..losses import domain_bce, entropy_weights, grad_reverse, multilinear_map, randomized_multilinear_map, \
    weighted_cross_entropy
from ..nets.discriminators import DomainHead
from ..nets.model import AdaptedModel
from .base import METHODS, Alignment, LossOut, Progress, SetupInfo, Stage, Update, WeightOptions


@METHODS.register("cdan")
class CDAN(Alignment):
    """encoder+head+discriminator ← CE(source) + BCE(domain of f ⊗ g) with the gradient reversed (×λ_p)."""

    name = "cdan"
    reference = "Long, Cao, Wang & Jordan, NeurIPS 2018"

    @dataclass
    class Options(WeightOptions):
        weight: float = 1.0  # λ: scale of the reversed gradient (the paper: 1, [memory])
        weight_schedule: str = "dann_ramp"  # factor on λ over progress p; dann_ramp = 2/(1+exp(−γp))−1 (DANN's)
        gamma: float = 10.0  # γ of the dann_ramp schedule (DANN, JMLR 2016, §5.2.2: 10); unused by others
        disc_hidden: List[int] = field(default_factory=lambda: [64, 64])  # hidden widths (ours; paper: 1024, 1024)
        entropy_weighting: bool = False  # CDAN+E: weight the domain loss by 1 + e^(−H(g)), normalised per domain
        max_map_size: int = 4096  # exact map f ⊗ g while F·K <= this, else the randomised one (paper: 4096)
        random_dim: int = 1024  # d, the randomised map's width (paper: 1024)
        grad_through_predictions: bool = False  # let the reversed gradient into the head through g (ours: off)

    def validate_options(self) -> None:
        o, owner = self.options, f"method {self.name!r}"
        check_number("gamma", owner, o.gamma, low=0, low_open=True)
        check_widths("disc_hidden", owner, o.disc_hidden)
        for flag in ("entropy_weighting", "grad_through_predictions"):
            if not isinstance(getattr(o, flag), bool):
                raise TypeError(f"The {flag!r} parameter of {owner} must be true or false. "
                                f"Got {getattr(o, flag)!r} instead.")
        check_number("max_map_size", owner, o.max_map_size, low=0, integer=True)
        check_number("random_dim", owner, o.random_dim, low=1, integer=True)

    @property
    def randomized(self) -> bool:
        """Whether the discriminator sees the randomised map (set in :meth:`setup`, from F·K)."""
        return getattr(self, "r_f", None) is not None

    def setup(self, model: AdaptedModel, info: SetupInfo) -> None:
        o = self.options
        hidden = check_widths("disc_hidden", f"method {self.name!r}", o.disc_hidden)
        exact = info.feature_dim * info.n_classes
        if exact <= int(o.max_map_size):
            r_f = r_g = None
            width = exact
        else:  # drawn once, from the run's seeded global generator; buffers, so checkpoints keep them
            width = int(o.random_dim)
            r_f, r_g = torch.randn(width, info.feature_dim), torch.randn(width, info.n_classes)  # (d, F), (d, K)
        self.register_buffer("r_f", r_f)
        self.register_buffer("r_g", r_g)
        self.discriminator = DomainHead(width, hidden, outputs=1)

    def lambda_at(self, p: float) -> float:
        """λ_p: the factor on the gradient the domain loss sends back into the encoder."""
        return self.weight_at(p)

    def conditioned(self, f: torch.Tensor, logits: torch.Tensor) -> torch.Tensor:
        """The discriminator's input T(h) for features ``f`` and head outputs ``logits``. ``(B, F), (B, K) → (B, D)``"""
        g = F.softmax(logits, dim=1)  # (B, K)
        if not self.options.grad_through_predictions:
            g = g.detach()
        if self.randomized:
            return randomized_multilinear_map(f, g, self.r_f, self.r_g)  # (B, d)
        return multilinear_map(f, g)  # (B, F·K)

    def loss(self, batch: Batch, t: Progress) -> LossOut:
        m = self.model
        f_s = m.features(batch.x_src, domain="source")  # (B, F)
        f_t = m.features(batch.x_tgt, domain="target")  # (B, F)
        logits_s, logits_t = m.head(f_s), m.head(f_t)  # (B, K)
        ce = weighted_cross_entropy(logits_s, batch.y_src, batch.w_src)
        lam = self.lambda_at(t.p)
        # reversal after the map: T is differentiable, so this reverses (×λ) the gradient into f (and g if allowed)
        d_s = self.discriminator(grad_reverse(self.conditioned(f_s, logits_s), lam))  # (B,)
        d_t = self.discriminator(grad_reverse(self.conditioned(f_t, logits_t), lam))  # (B,)
        w_s, w_t = batch.w_src, None
        if self.options.entropy_weighting:  # constants: normalised per domain by domain_bce's weighted means
            w_s = entropy_weights(logits_s.detach(), normalise=False)
            w_s = w_s if batch.w_src is None else w_s * batch.w_src
            w_t = entropy_weights(logits_t.detach(), normalise=False)
        dom = domain_bce(d_s, d_t, w_s, w_t)
        return ce + dom, {"ce": ce.detach(), "domain": dom.detach(), "lambda": torch.tensor(lam, device=ce.device)}

    def stages(self) -> List[Stage]:
        m = self.model
        return [Stage("train", [Update("adversarial", [m.encoder, m.head, self.discriminator], self.loss)])]
