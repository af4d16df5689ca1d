"""A user's own alignment *module*: a full ``adaptkit.Alignment`` subclass, usable by import path from a config.

``MeanMatchEntropy`` aligns the feature means of the two domains and, as in entropy minimisation (Grandvalet &
Bengio, NIPS 2004), pushes target predictions to be confident. It declares one stage with one update; the loop
does the rest (optimiser, schedule, logging, checkpoints). From a notebook::

    import adaptkit
    from examples.entropy_alignment import MeanMatchEntropy
    run = adaptkit.fit("rotated_moons", method=MeanMatchEntropy(weight=1.0, entropy_weight=0.1), steps=600)

From the command line, by import path (run from the repository root; importing the module runs its code, so
treat such a config like code)::

    adaptkit-train method=source_only method.name=examples.entropy_alignment.MeanMatchEntropy \\
        +method.weight=1.0 +method.entropy_weight=0.1 data=rotated_moons steps=600
"""
from dataclasses import dataclass
from typing import List

import torch
import torch.nn.functional as F

from adaptkit import Alignment, Stage, Update
from adaptkit._checks import check_number


class MeanMatchEntropy(Alignment):
    """encoder+head ← CE(source) + weight·‖mean f_s − mean f_t‖² + entropy_weight·H(p_target)."""

    name = "mean_match_entropy"
    reference = "entropy term: Grandvalet & Bengio, NIPS 2004"

    @dataclass
    class Options:
        weight: float = 1.0  # λ on the squared distance between feature means
        entropy_weight: float = 0.1  # weight on the mean prediction entropy of target samples

    def validate_options(self) -> None:
        check_number("weight", "method 'mean_match_entropy'", self.options.weight, low=0)
        check_number("entropy_weight", "method 'mean_match_entropy'", self.options.entropy_weight, low=0)

    def loss(self, batch, t):
        m = self.model
        f_s = m.features(batch.x_src, domain="source")  # (B, F)
        f_t = m.features(batch.x_tgt, domain="target")  # (B, F)
        ce = F.cross_entropy(m.head(f_s), batch.y_src)
        gap = (f_s.mean(0) - f_t.mean(0)).pow(2).sum()
        p_t = F.softmax(m.head(f_t), dim=1)  # (B, K)
        entropy = -(p_t * torch.log(p_t.clamp_min(1e-12))).sum(1).mean()
        o = self.options
        return ce + o.weight * gap + o.entropy_weight * entropy, {"gap": gap.detach(), "entropy": entropy.detach()}

    def stages(self) -> List[Stage]:
        m = self.model
        return [Stage("train", [Update("classify_align", [m.encoder, m.head], self.loss)])]
