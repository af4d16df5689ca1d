"""Pure loss functions. Each takes tensors (features, logits, weights) — never loaders — and cites its source."""
from __future__ import annotations

from typing import Optional

import torch
import torch.nn.functional as F


def weighted_cross_entropy(logits: torch.Tensor, y: torch.Tensor, w: Optional[torch.Tensor] = None) -> torch.Tensor:
    """Mean cross-entropy, optionally weighted per sample: Σ w_i·CE_i / Σ w_i. Labels of −1 are ignored.

    Shape: logits ``(B, K)``, y ``(B,)``, w ``(B,)`` or None → scalar.
    """
    if w is None:
        return F.cross_entropy(logits, y, ignore_index=-1)
    ce = F.cross_entropy(logits, y, ignore_index=-1, reduction="none")  # (B,)
    w = w * (y != -1)
    return (w * ce).sum() / w.sum().clamp_min(1e-12)
