"""Deep CORAL: align second-order feature statistics (Sun & Saenko, ECCV Workshops 2016).

One update: encoder+head ← CE(source) + weight·‖C_S − C_T‖²_F / (4d²) on the batch's features
(:func:`~adaptkit.losses.coral_distance`, the paper's Eqs. 1–2). The paper chooses the weight so that the
classification and CORAL losses are about equal at the end of training (§3); log both ("ce", "align") to tune it.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Dict, List, Tuple

import torch

from .._checks import check_number
from ..data.batches import Batch
from ..losses import coral_distance, weighted_cross_entropy
from ..nets.model import AdaptedModel
from ..train.schedules import get_schedule
from .base import METHODS, Alignment, Progress, SetupInfo, Stage, Update


@METHODS.register("coral")
class DeepCORAL(Alignment):
    """encoder+head ← CE(source) + λ·‖C_S − C_T‖²_F / 4d²."""

    name = "coral"
    reference = "Sun & Saenko, ECCV Workshops 2016"

    @dataclass
    class Options:
        weight: float = 3000.0  # λ; ours, tuned on toys (the paper balances CORAL and CE at the end of training; /4d² makes it small)
        weight_schedule: str = "constant"  # factor on λ over progress p (see adaptkit.train.schedules)

    def validate_options(self) -> None:
        o, owner = self.options, f"method {self.name!r}"
        check_number("weight", owner, o.weight, low=0)
        get_schedule(o.weight_schedule, owner)

    def setup(self, model: AdaptedModel, info: SetupInfo) -> None:
        if info.batch_size < 2:
            raise ValueError(f"method {self.name!r} needs a batch size of at least 2 (a covariance needs 2 samples "
                             f"per domain); got batch_size={info.batch_size}.")

    def loss(self, batch: Batch, t: Progress) -> Tuple[torch.Tensor, Dict[str, torch.Tensor]]:
        m = self.model
        f_s = m.features(batch.x_src, domain="source")  # (B, F)
        f_t = m.features(batch.x_tgt, domain="target")  # (B, F)
        ce = weighted_cross_entropy(m.head(f_s), batch.y_src, batch.w_src)
        align = coral_distance(f_s, f_t, batch.w_src)
        lam = self.weight_at(t.p)
        return ce + lam * align, {"ce": ce.detach(), "align": align.detach()}

    def stages(self) -> List[Stage]:
        m = self.model
        return [Stage("train", [Update("classify_align", [m.encoder, m.head], self.loss)])]
