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
from typing import Any, Callable

import torch

from ..registry import import_object
from .base import METHODS, DistanceAlignment


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
class FeatureLoss(DistanceAlignment):
    """encoder+head ← CE(source) + λ·loss_fn(source features, target features)."""

    name = "feature_loss"
    reference = "user-defined feature loss"

    @dataclass
    class Options(DistanceAlignment.Options):
        loss_fn: Any = None  # required: function (f_s, f_t) -> scalar tensor, or its import path 'module.attr'

    def validate_options(self) -> None:
        self._loss_fn = resolve_loss_fn(self.options.loss_fn, f"method {self.name!r}")

    def distance(self, f_s, f_t, w_src):
        align = self._loss_fn(f_s, f_t)
        if not isinstance(align, torch.Tensor) or align.numel() != 1:
            got = f"a tensor of shape {tuple(align.shape)}" if isinstance(align, torch.Tensor) else repr(align)
            raise TypeError(f"method {self.name!r}: loss_fn {getattr(self._loss_fn, '__name__', self._loss_fn)!r} "
                            f"must return a scalar tensor (one element, differentiable); got {got}.")
        return align.reshape(())
