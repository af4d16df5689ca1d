"""Encoders: map an input to a feature vector. Each exposes ``out_features``."""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import List, Sequence, Tuple

import torch
from torch import nn

from .._checks import build_options, check_choice, check_number, check_widths
from ..registry import Registry

ENCODERS: Registry = Registry("encoder")


def mlp_layers(sizes: Sequence[int], dropout: float = 0.0, last_activation: bool = True) -> List[nn.Module]:
    layers: List[nn.Module] = []
    for i, (a, b) in enumerate(zip(sizes[:-1], sizes[1:])):
        layers.append(nn.Linear(a, b))
        if i < len(sizes) - 2 or last_activation:
            layers.append(nn.ReLU())
            if dropout > 0:
                layers.append(nn.Dropout(dropout))
    return layers


@ENCODERS.register("mlp")
class MLPEncoder(nn.Module):
    """Fully connected encoder for flat (tabular or flattened) inputs: Linear–ReLU blocks.

    Shape: input ``(B, *input_shape)`` (flattened), output ``(B, out_features)``.
    """

    @dataclass
    class Options:
        hidden: List[int] = field(default_factory=lambda: [64])  # widths of the hidden layers
        features: int = 32  # width of the feature layer (the encoder's output)
        dropout: float = 0.0  # dropout after each hidden layer

    def __init__(self, input_shape: Tuple[int, ...], **options):
        super().__init__()
        owner = "encoder 'mlp'"
        o = build_options(self.Options, owner, options)
        check_widths("hidden", owner, o.hidden)
        check_number("features", owner, o.features, low=1, integer=True)
        check_number("dropout", owner, o.dropout, low=0, high=1, high_open=True)
        self.options = o
        d_in = int(math.prod(input_shape))
        self.net = nn.Sequential(nn.Flatten(), *mlp_layers([d_in, *o.hidden, o.features], o.dropout))
        self.out_features = o.features

    @classmethod
    def memory_sizes(cls, input_shape, options: dict) -> tuple:
        """``(parameters, floats kept per sample for the backward pass)`` of the encoder these options build,
        computed without building it (the check before training: :mod:`adaptkit.train.memory`): each layer's
        weights and bias; its linear output and its activation per sample."""
        o = cls.Options(**options)
        sizes = [int(math.prod(input_shape)), *map(int, o.hidden), int(o.features)]
        params = sum((a + 1) * b for a, b in zip(sizes[:-1], sizes[1:]))
        return params, 2 * sum(sizes[1:])

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.net(x)


@ENCODERS.register("small_cnn")
class SmallCNN(nn.Module):
    """A LeNet-style CNN for small images (8×8 up to 32×32, 1 or 3 channels): two conv–ReLU–maxpool blocks, then a
    fully connected feature layer. Flat inputs of ``side*side*channels`` values are reshaped to images.

    Shape: input ``(B, C, H, W)`` or ``(B, C*H*W)``; output ``(B, out_features)``.
    """

    @dataclass
    class Options:
        channels: List[int] = field(default_factory=lambda: [16, 32])  # conv widths of the two blocks
        features: int = 64  # width of the feature layer
        in_channels: int = 0  # 0 = infer from input_shape (1 for flat inputs)

    def __init__(self, input_shape: Tuple[int, ...], **options):
        super().__init__()
        owner = "encoder 'small_cnn'"
        o = build_options(self.Options, owner, options)
        if len(check_widths("channels", owner, o.channels)) != 2:
            raise ValueError(f"The 'channels' parameter of {owner} must hold two widths (one per conv block). Got "
                             f"{o.channels!r} instead.")
        check_number("features", owner, o.features, low=1, integer=True)
        check_choice("in_channels", owner, o.in_channels, [0, 1, 3])
        self.options = o
        if len(input_shape) == 3:
            c, h, w = input_shape
        elif len(input_shape) == 1:
            c = o.in_channels or 1
            side = math.isqrt(input_shape[0] // c)
            if side * side * c != input_shape[0]:
                raise ValueError(f"encoder 'small_cnn' needs square images; a flat input of {input_shape[0]} values "
                                 f"is not {c}×side×side. Pass inputs shaped (N, C, H, W).")
            h = w = side
        else:
            raise ValueError(f"encoder 'small_cnn' needs inputs shaped (C, H, W) or flat; got {input_shape}.")
        if c not in (1, 3) or not (8 <= h <= 32 and 8 <= w <= 32):
            raise ValueError(f"encoder 'small_cnn' is built for 1 or 3 channels and 8..32 pixels a side; got "
                             f"{c}×{h}×{w}. Use your own nn.Module for other images.")
        self.image_shape = (c, h, w)
        c1, c2 = o.channels
        self.conv = nn.Sequential(
            nn.Conv2d(c, c1, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2),
            nn.Conv2d(c1, c2, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2),
            nn.Flatten(),
        )
        flat = c2 * (h // 4) * (w // 4)
        self.fc = nn.Sequential(nn.Linear(flat, o.features), nn.ReLU())
        self.out_features = o.features

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = x.reshape(x.shape[0], *self.image_shape)  # (B, C, H, W)
        return self.fc(self.conv(x))


def build_encoder(name: str, input_shape: Tuple[int, ...], **options) -> nn.Module:
    return ENCODERS.get(name)(tuple(input_shape), **options)


@torch.no_grad()
def feature_size(encoder: nn.Module, input_shape: Tuple[int, ...]) -> int:
    """The width of ``encoder``'s output: its ``out_features`` attribute, else one dummy forward pass."""
    n = getattr(encoder, "out_features", None)
    if isinstance(n, int):
        return n
    was_training = encoder.training
    encoder.eval()
    try:
        param = next(encoder.parameters(), None)
        dev = param.device if param is not None else "cpu"
        out = encoder(torch.zeros(2, *input_shape, device=dev))
    finally:
        encoder.train(was_training)
    if out.ndim != 2:
        raise ValueError(f"an encoder must return (batch, features); {type(encoder).__name__} returned shape "
                         f"{tuple(out.shape)}. Add a flatten at its end.")
    return int(out.shape[1])
