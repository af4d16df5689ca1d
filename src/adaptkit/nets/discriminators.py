"""Domain discriminators: features → domain logit(s)."""
from __future__ import annotations

from typing import Sequence

import torch
from torch import nn

from .encoders import mlp_layers


class DomainHead(nn.Module):
    """An MLP that scores a feature vector for "came from the source".

    ``outputs=1`` gives one logit for binary cross-entropy (DANN, ADDA); ``outputs=2`` gives two logits for a
    softmax over domains (the domain-confusion loss).

    Shape: ``(B, in_features)`` → ``(B,)`` when ``outputs=1``, else ``(B, outputs)``.
    """

    def __init__(self, in_features: int, hidden: Sequence[int] = (64, 64), outputs: int = 1):
        super().__init__()
        self.outputs = outputs
        self.net = nn.Sequential(*mlp_layers([in_features, *hidden, outputs], last_activation=False))

    def forward(self, f: torch.Tensor) -> torch.Tensor:
        out = self.net(f)
        return out.squeeze(1) if self.outputs == 1 else out
