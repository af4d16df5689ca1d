"""feature_loss: any plain function of (source features, target features) as an alignment method.

One update: encoder+head ← CE(source) + weight·schedule(p)·loss_fn(f_s, f_t). ``loss_fn`` is a callable, or an
import path ``'package.module.function'`` resolved with importlib — importing runs that module's code, so treat a
config naming one like code. This is what :func:`~adaptkit.methods.build_method` builds from a bare function.

Example:
    >>> def mean_gap(fs, ft):
    ...     return (fs.mean(0) - ft.mean(0)).pow(2).sum()
    >>> FeatureLoss(loss_fn=mean_gap, weight=0.1).options.weight
    0.1
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Dict, List, Tuple

import torch

from .._checks import check_number
from ..data.batches import Batch
from ..losses import weighted_cross_entropy
from ..train.schedules import get_schedule
from ..registry import import_object
from .base import METHODS, Alignment, Progress, Stage, Update


def resolve_loss_fn(value: Any, owner: str) -> Callable[[torch.Tensor, torch.Tensor], torch.Tensor]:
    """A callable as is, or the attribute named by ``'module.attr'``; errors name the option and what is accepted."""
    if isinstance(value, str):
        mod_name, _, attr = value.rpartition(".")
        if not mod_name or not attr:
            raise ValueError(f"The 'loss_fn' parameter of {owner} must be a callable or an import path "
                             f"'module.attribute'. Got {value!r} instead.")
        try:
            value = import_object(value)
        except (ImportError, AttributeError) as e:
            raise ValueError(f"The 'loss_fn' parameter of {owner} names {value!r}, which cannot be imported: {e}"
                             ) from None
    if isinstance(value, type) or not callable(value):
        raise TypeError(f"The 'loss_fn' parameter of {owner} must be a function (source_features, "
                        f"target_features) -> scalar tensor, or its import path. Got {value!r} instead.")
    return value


@METHODS.register("feature_loss")
class FeatureLoss(Alignment):
    """encoder+head ← CE(source) + λ·loss_fn(source features, target features)."""

    name = "feature_loss"
    reference = "user-defined feature loss"

    @dataclass
    class Options:
        loss_fn: Any = None  # required: function (f_s, f_t) -> scalar tensor, or its import path 'module.attr'
        weight: float = 1.0  # λ on the user's loss
        weight_schedule: str = "constant"  # factor on λ over progress p (see adaptkit.train.schedules)

    def validate_options(self) -> None:
        o, owner = self.options, f"method {self.name!r}"
        self._loss_fn = resolve_loss_fn(o.loss_fn, owner)
        check_number("weight", owner, o.weight, low=0)
        get_schedule(o.weight_schedule, owner)

    def loss(self, batch: Batch, t: Progress) -> Tuple[torch.Tensor, Dict[str, torch.Tensor]]:
        m = self.model
        f_s = m.features(batch.x_src, domain="source")  # (B, F)
        f_t = m.features(batch.x_tgt, domain="target")  # (B, F)
        ce = weighted_cross_entropy(m.head(f_s), batch.y_src, batch.w_src)
        align = self._loss_fn(f_s, f_t)
        if not isinstance(align, torch.Tensor) or align.numel() != 1:
            got = f"a tensor of shape {tuple(align.shape)}" if isinstance(align, torch.Tensor) else repr(align)
            raise TypeError(f"method {self.name!r}: loss_fn {getattr(self._loss_fn, '__name__', self._loss_fn)!r} "
                            f"must return a scalar tensor (one element, differentiable); got {got}.")
        align = align.reshape(())
        lam = self.weight_at(t.p)
        return ce + lam * align, {"ce": ce.detach(), "align": align.detach()}

    def stages(self) -> List[Stage]:
        m = self.model
        return [Stage("train", [Update("classify_align", [m.encoder, m.head], self.loss)])]
