"""Deep CORAL: align second-order feature statistics (Sun & Saenko, ECCV Workshops 2016).

One update: encoder+head ← CE(source) + weight·‖C_S − C_T‖²_F / (4d²) on the batch's features
(:func:`~adaptkit.losses.coral_distance`, the paper's Eqs. 1–2). The paper chooses the weight so that the
classification and CORAL losses are about equal at the end of training (§3); log both ("ce", "align") to tune it.
"""
from __future__ import annotations

from dataclasses import dataclass

from ..losses import coral_distance
from .base import METHODS, DistanceAlignment


@METHODS.register("coral")
class DeepCORAL(DistanceAlignment):
    """encoder+head ← CE(source) + λ·‖C_S − C_T‖²_F / 4d²."""

    name = "coral"
    reference = "Sun & Saenko, ECCV Workshops 2016"
    min_batch_size, min_batch_reason = 2, "a covariance needs 2 samples per domain"

    @dataclass
    class Options(DistanceAlignment.Options):
        weight: float = 3000.0  # λ; ours, tuned on toys (the paper balances CORAL and CE at the end of training; /4d² makes it small)

    def distance(self, f_s, f_t, w_src):
        return coral_distance(f_s, f_t, w_src)
