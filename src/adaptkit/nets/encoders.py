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


def _two_conv_options(options_cls, owner: str, options, per: str):
    """The checked options of a two-convolution encoder: two channel widths, a positive feature width, and
    ``in_channels`` 0 (inferred), 1 or 3."""
    o = build_options(options_cls, owner, options)
    if len(check_widths("channels", owner, o.channels)) != 2:
        raise ValueError(f"The 'channels' parameter of {owner} must hold two widths ({per}). Got "
                         f"{o.channels!r} instead.")
    check_number("features", owner, o.features, low=1, integer=True)
    check_choice("in_channels", owner, o.in_channels, [0, 1, 3])
    return o


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
        o = self.options = _two_conv_options(self.Options, owner, options, "one per conv block")
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


def _image_shape(input_shape: Tuple[int, ...], in_channels: int, owner: str) -> Tuple[int, int, int]:
    """``(C, H, W)`` of an image input, or of a flat one of ``C*side*side`` values (``C`` = ``in_channels`` or 1)."""
    if len(input_shape) == 3:
        return tuple(int(v) for v in input_shape)
    if len(input_shape) == 1:
        c = in_channels or 1
        side = math.isqrt(input_shape[0] // c)
        if side * side * c != input_shape[0]:
            raise ValueError(f"{owner} needs square images; a flat input of {input_shape[0]} values is not "
                             f"{c}×side×side. Pass inputs shaped (N, C, H, W).")
        return c, side, side
    raise ValueError(f"{owner} needs inputs shaped (C, H, W) or flat; got {input_shape}.")


@ENCODERS.register("lenet")
class LeNet(nn.Module):
    """The LeNet encoder of the digit-adaptation papers: two 5×5 convolutions (no padding), each followed by a 2×2
    max-pool and a ReLU, then a fully connected feature layer with a ReLU.

    Layer sizes (defaults) — 20 and 50 convolution channels, 500 features — are those of the LeNet that ADDA (Tzeng,
    Hoffman, Saenko & Darrell, CVPR 2017, §4.1) uses for MNIST, USPS and SVHN [memory, as in
    /work/shared/REFERENCES.md: "LeNet encoder, 500-d features"], itself the LeNet-5 family of LeCun, Bottou, Bengio &
    Haffner (Proc. IEEE 86(11), 1998) in its common 20–50–500 form. On a 28×28 grey digit:
    ``1×28×28 → conv 5×5 → 20×24×24 → pool → 20×12×12 → conv 5×5 → 50×8×8 → pool → 50×4×4 → fc 800→500``;
    on a 32×32 RGB digit: ``3×32×32 → 20×28×28 → 20×14×14 → 50×10×10 → 50×5×5 → fc 1250→500``. The class head
    (``head=linear``: 500→10) is separate, as for every encoder.

    Shape: input ``(B, C, H, W)`` or ``(B, C*H*W)`` with ``C`` 1 or 3 and 16..64 pixels a side; output
    ``(B, features)``.

    Example:
        >>> enc = LeNet((1, 28, 28))
        >>> enc(torch.zeros(2, 1, 28, 28)).shape
        torch.Size([2, 500])
    """

    @dataclass
    class Options:
        channels: List[int] = field(default_factory=lambda: [20, 50])  # widths of the two 5×5 convolutions
        features: int = 500  # width of the feature layer (the encoder's output)
        in_channels: int = 0  # 0 = infer from input_shape (1 for flat inputs)

    def __init__(self, input_shape: Tuple[int, ...], **options):
        super().__init__()
        owner = "encoder 'lenet'"
        o = self.options = _two_conv_options(self.Options, owner, options, "one per convolution")
        c, h, w = _image_shape(tuple(input_shape), o.in_channels, owner)
        if c not in (1, 3) or not (16 <= h <= 64 and 16 <= w <= 64):
            raise ValueError(f"{owner} is built for 1 or 3 channels and 16..64 pixels a side; got {c}×{h}×{w}. "
                             "Resize the images (data.size) or use a ResNet encoder for larger ones.")
        self.image_shape = (c, h, w)
        c1, c2 = (int(v) for v in o.channels)
        self.conv = nn.Sequential(
            nn.Conv2d(c, c1, 5), nn.MaxPool2d(2), nn.ReLU(),
            nn.Conv2d(c1, c2, 5), nn.MaxPool2d(2), nn.ReLU(),
            nn.Flatten(),
        )
        side = lambda n: ((n - 4) // 2 - 4) // 2  # noqa: E731 — a 5×5 valid convolution takes 4, a pool halves
        self.fc = nn.Sequential(nn.Linear(c2 * side(h) * side(w), int(o.features)), nn.ReLU())
        self.out_features = int(o.features)

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
