"""Task heads: map features to class logits."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import List

import torch
from torch import nn

from .._checks import build_options, check_number, check_widths
from ..registry import Registry

HEADS: Registry = Registry("head")


@HEADS.register("linear")
class LinearHead(nn.Module):
    """One linear layer. Shape: ``(B, in_features)`` → ``(B, n_classes)``."""

    @dataclass
    class Options:
        pass

    def __init__(self, in_features: int, n_classes: int, **options):
        super().__init__()
        self.options = build_options(self.Options, "head 'linear'", options)
        self.fc = nn.Linear(in_features, n_classes)

    def forward(self, f: torch.Tensor) -> torch.Tensor:
        return self.fc(f)


@HEADS.register("mlp")
class MLPHead(nn.Module):
    """Dropout–Linear–ReLU blocks then a linear layer. Dropout sits *before* every linear layer so that two
    forward passes in training mode sample two different classifiers (what ADR's critic needs).

    Shape: ``(B, in_features)`` → ``(B, n_classes)``.
    """

    @dataclass
    class Options:
        hidden: List[int] = field(default_factory=lambda: [64])  # hidden widths
        dropout: float = 0.5  # drop probability before each linear layer (ADR, Saito et al. 2018: 0.5)

    def __init__(self, in_features: int, n_classes: int, **options):
        super().__init__()
        o = build_options(self.Options, "head 'mlp'", options)
        check_widths("hidden", "head 'mlp'", o.hidden)
        check_number("dropout", "head 'mlp'", o.dropout, low=0, high=1, high_open=True)
        self.options = o
        sizes = [in_features, *o.hidden, n_classes]
        layers: List[nn.Module] = []
        for i, (a, b) in enumerate(zip(sizes[:-1], sizes[1:])):
            if o.dropout > 0:
                layers.append(nn.Dropout(o.dropout))
            layers.append(nn.Linear(a, b))
            if i < len(sizes) - 2:
                layers.append(nn.ReLU())
        self.net = nn.Sequential(*layers)

    def forward(self, f: torch.Tensor) -> torch.Tensor:
        return self.net(f)


def build_head(name: str, in_features: int, n_classes: int, **options) -> nn.Module:
    return HEADS.get(name)(in_features, n_classes, **options)
