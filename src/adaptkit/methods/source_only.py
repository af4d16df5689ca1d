"""Source-only: train encoder and head on labelled source data alone — the baseline every method must beat."""
from __future__ import annotations

from typing import List

from .base import METHODS, Alignment, Stage, Update


@METHODS.register("source_only")
class SourceOnly(Alignment):
    """No alignment: encoder+head ← CE(source). The target is never used for training."""

    name = "source_only"
    reference = "baseline (no adaptation)"
    uses_target_data = False

    def stages(self) -> List[Stage]:
        m = self.model
        return [Stage("train", [Update("classify", [m.encoder, m.head], self.source_loss)])]
