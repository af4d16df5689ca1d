"""AdaptedModel: encoder + head, with an optional unshared target encoder (ADDA)."""
from __future__ import annotations

from typing import Optional

import torch
from torch import nn


class AdaptedModel(nn.Module):
    """The trained classifier. ``target_encoder`` is ``None`` when both domains share the encoder; when set, it
    serves target data once ``target_encoder_active`` is true.

    ``forward(x)`` predicts for *target* data (the deployed use); ``forward(x, domain="source")`` uses the source
    encoder.
    """

    def __init__(self, encoder: nn.Module, head: nn.Module, feature_dim: int, n_classes: int):
        super().__init__()
        self.encoder = encoder
        self.head = head
        self.target_encoder: Optional[nn.Module] = None
        # Saved with the weights: whether target data goes through target_encoder (ADDA switches it on when its
        # adapt stage starts; before that the unshared copy is untrained and the source encoder answers).
        self.register_buffer("target_encoder_active", torch.tensor(False))
        self.feature_dim = feature_dim
        self.n_classes = n_classes

    def encoder_for(self, domain: str) -> nn.Module:
        if domain == "target" and self.target_encoder is not None and bool(self.target_encoder_active):
            return self.target_encoder
        if domain not in ("source", "target"):
            raise ValueError(f"domain must be 'source' or 'target'; got {domain!r}.")
        return self.encoder

    def features(self, x: torch.Tensor, domain: str = "target") -> torch.Tensor:
        return self.encoder_for(domain)(x)  # (B, feature_dim)

    def forward(self, x: torch.Tensor, domain: str = "target") -> torch.Tensor:
        return self.head(self.features(x, domain))  # (B, n_classes)
