"""Target oracle: train on *target labels*. An upper bound for benchmarks — never a method to deploy.

It is an ordinary source-only learner that the runner feeds labelled target data in place of the source
(``DomainPair.oracle_training_data``); it exists to measure how much of the source-only → target gap a method
closes. In real use the target has no labels and this method cannot run.
"""
from __future__ import annotations

from typing import List

from .base import METHODS, Alignment, Stage, Update


@METHODS.register("target_oracle")
class TargetOracle(Alignment):
    """encoder+head ← CE(target labels). Upper bound only; needs target labels."""

    name = "target_oracle"
    uses_target_labels = True
    reference = "upper bound (trained on target labels)"

    def stages(self) -> List[Stage]:
        m = self.model
        return [Stage("train", [Update("classify", [m.encoder, m.head], self.source_loss)])]
