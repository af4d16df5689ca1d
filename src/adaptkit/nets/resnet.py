"""torchvision ResNet-18/50 encoders, with weights from a local file only (never a download).

Each is torchvision's network with its ImageNet classifier (``fc``) removed: the output is the globally pooled
feature (512 wide for ResNet-18, 2048 for ResNet-50), or an optional *bottleneck* — Linear → BatchNorm → ReLU of
the given width — as most adaptation papers add after the pretrained pool layer (a 256-unit bottleneck: Ganin et al.,
JMLR 2016, Office experiments; Long et al., CDAN, NeurIPS 2018 [memory]).

Options for fine-tuning: ``freeze`` keeps the backbone's weights and batch-norm statistics as loaded (only the
bottleneck and the head learn); ``backbone_lr_scale`` trains the backbone at that fraction of the run's learning
rate — 0.1 is the usual "10× rule" of fine-tuning (new layers at ten times the pretrained layers' rate): common
practice, not a result of ours. The scale reaches the optimiser through :meth:`ResNetEncoder.lr_scales`, which the
loop reads from any module (:func:`adaptkit.train.optim.parameter_groups`) — the loop never names an encoder.

Grey images (1 channel) are repeated to 3 channels, so a pretrained RGB backbone reads digits as they are.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Dict, Optional, Tuple

import torch
from torch import nn

from .._checks import build_options, check_number
from .encoders import ENCODERS

POOLED = {"resnet18": 512, "resnet50": 2048}  # width of torchvision's pooled feature (its fc's in_features)
CLASSIFIER = "fc."  # torchvision's ImageNet classifier: dropped from a weights file, not part of the encoder


class ResNetEncoder(nn.Module):
    """A torchvision ResNet without its classifier; see the module docstring. Subclasses set ``arch``.

    Shape: input ``(B, C, H, W)`` with ``C`` in {1, 3} (any size from 16×16: the pool is adaptive); output
    ``(B, out_features)`` with ``out_features`` = ``bottleneck`` or the pooled width (512 / 2048).
    """

    arch = ""

    @dataclass
    class Options:
        weights_path: Optional[str] = None  # a local state-dict file of torchvision's network (None: random init)
        bottleneck: int = 0  # width of a Linear+BN+ReLU layer after pooling (0: none, the pooled feature is output)
        freeze: bool = False  # keep the backbone as loaded: no gradient step, batch-norm statistics unchanged
        backbone_lr_scale: float = 1.0  # backbone's learning rate / the run's (0.1: the usual 10x fine-tuning rule)

    def __init__(self, input_shape: Tuple[int, ...], **options):
        super().__init__()
        owner = f"encoder {self.arch!r}"
        o = build_options(self.Options, owner, options)
        if o.weights_path is not None and not isinstance(o.weights_path, (str, Path)):
            raise TypeError(f"The 'weights_path' parameter of {owner} must be a file path or None. Got "
                            f"{o.weights_path!r} instead.")
        check_number("bottleneck", owner, o.bottleneck, low=0, integer=True)
        if not isinstance(o.freeze, bool):
            raise TypeError(f"The 'freeze' parameter of {owner} must be True or False. Got {o.freeze!r} instead.")
        check_number("backbone_lr_scale", owner, o.backbone_lr_scale, low=0, low_open=True, high=1)
        if o.freeze and o.backbone_lr_scale != 1.0:
            raise ValueError(f"The 'backbone_lr_scale' parameter of {owner} has nothing to scale with freeze=True "
                             f"(the backbone is not trained). Got {o.backbone_lr_scale!r}; drop one of the two.")
        if len(input_shape) != 3 or input_shape[0] not in (1, 3) or min(input_shape[1:]) < 16:
            raise ValueError(f"{owner} needs images shaped (C, H, W) with 1 or 3 channels and at least 16 pixels a "
                             f"side; got input shape {tuple(input_shape)}. Resize or reshape the inputs.")
        weights = _read_weights(o.weights_path, owner) if o.weights_path is not None else None
        self.options = o
        self.image_shape = tuple(int(s) for s in input_shape)

        import torchvision  # here, not at import: only a run that builds a ResNet pays for it

        net = getattr(torchvision.models, self.arch)(weights=None)  # never a hub: weights come from weights_path
        net.fc = nn.Identity()
        if weights is not None:
            _load_checked(net, weights, o.weights_path, self.arch)
        self.backbone = net
        width = POOLED[self.arch]
        self.bottleneck = (nn.Sequential(nn.Linear(width, o.bottleneck), nn.BatchNorm1d(o.bottleneck), nn.ReLU())
                           if o.bottleneck else nn.Identity())
        self.out_features = o.bottleneck or width
        if o.freeze:
            self.backbone.requires_grad_(False)
            self.backbone.eval()

    @classmethod
    def memory_sizes(cls, input_shape, options: dict) -> tuple:
        """``(parameters, floats kept per sample for the backward pass)`` for the memory check before training
        (:mod:`adaptkit.train.memory`): the encoder is built on torch's ``meta`` device (shapes only, no storage,
        no weights file read) and one sample is passed through it, counting every leaf module's output — an upper
        bound on what autograd keeps (a frozen backbone keeps less)."""
        opts = {**dict(options), "weights_path": None}
        with torch.device("meta"):
            enc = cls(tuple(input_shape), **opts)
        kept = []
        hooks = [m.register_forward_hook(lambda mod, i, out: kept.append(out.numel()))
                 for m in enc.modules() if not list(m.children())]
        try:
            enc.eval()(torch.zeros(1, *input_shape, device="meta"))
        finally:
            for h in hooks:
                h.remove()
        return sum(p.numel() for p in enc.parameters()), sum(kept)

    def train(self, mode: bool = True) -> "ResNetEncoder":
        super().train(mode)
        if self.options.freeze:
            self.backbone.eval()  # frozen means frozen: batch-norm running statistics stay those loaded
        return self

    def lr_scales(self) -> Dict[nn.Parameter, float]:
        """``{parameter: learning-rate scale}`` for the backbone's parameters when ``backbone_lr_scale`` is not 1
        (read by :func:`adaptkit.train.optim.parameter_groups`); parameters not listed train at the run's rate."""
        s = float(self.options.backbone_lr_scale)
        return {} if s == 1.0 else {p: s for p in self.backbone.parameters()}

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = x.reshape(x.shape[0], *self.image_shape)  # (B, C, H, W)
        if self.image_shape[0] == 1:
            x = x.expand(-1, 3, -1, -1)  # (B, 3, H, W): grey repeated to the RGB the backbone was built for
        return self.bottleneck(self.backbone(x))  # (B, pooled) -> (B, out_features)


def _read_weights(path, owner: str) -> Dict[str, torch.Tensor]:
    """A state dict from ``path``, read with ``weights_only=True`` (tensors and plain containers only: a pickle
    cannot run code); errors are one line naming the file."""
    p = Path(path).expanduser()
    if not p.is_file():
        raise ValueError(f"The 'weights_path' parameter of {owner} names no file: {str(p)!r}. Give a state-dict file "
                         "saved with torch.save(model.state_dict(), path) from torchvision's network.")
    try:
        state = torch.load(p, map_location="cpu", weights_only=True)
    except Exception as e:  # noqa: BLE001 — any unreadable or unsafe file: one line naming it
        first = str(e).strip().splitlines()[0] if str(e).strip() else type(e).__name__
        raise ValueError(f"weights file {str(p)!r} for {owner} cannot be read safely as a state dict "
                         f"(torch.load with weights_only=True): {first}") from None
    if isinstance(state, dict) and isinstance(state.get("state_dict"), dict):
        state = state["state_dict"]  # a checkpoint that wraps its state dict
    if not isinstance(state, dict) or not all(isinstance(k, str) and isinstance(v, torch.Tensor)
                                              for k, v in state.items()):
        raise ValueError(f"weights file {str(p)!r} for {owner} holds a {type(state).__name__}, not a state dict "
                         "(a mapping of tensor names to tensors).")
    return state


def _load_checked(net: nn.Module, state: Dict[str, torch.Tensor], path, arch: str) -> None:
    """Load ``state`` into ``net`` (torchvision's network less its classifier) after checking every key and shape;
    a mismatch is refused naming the file, the first offending tensor and how many more there are."""
    state = {k: v for k, v in state.items() if not k.startswith(CLASSIFIER)}  # the ImageNet classifier is not ours
    own = net.state_dict()
    missing = [k for k in own if k not in state]
    unexpected = [k for k in state if k not in own]
    shapes = [k for k in own if k in state and state[k].shape != own[k].shape]
    for kind, keys in (("missing", missing), ("unexpected", unexpected)):
        if keys:
            more = f" (and {len(keys) - 1} more)" if len(keys) > 1 else ""
            raise ValueError(f"weights file {str(path)!r} does not match torchvision's {arch}: {kind} key "
                             f"{keys[0]!r}{more}. Save it from torchvision.models.{arch}().state_dict().")
    if shapes:
        k = shapes[0]
        raise ValueError(f"weights file {str(path)!r} does not match torchvision's {arch}: tensor {k!r} "
                         f"has shape {tuple(state[k].shape)}, expected {tuple(own[k].shape)}"
                         f"{f' (and {len(shapes) - 1} more)' if len(shapes) > 1 else ''}.")
    net.load_state_dict(state, strict=True)


@ENCODERS.register("resnet18")
class ResNet18(ResNetEncoder):
    __doc__ = ResNetEncoder.__doc__
    arch = "resnet18"


@ENCODERS.register("resnet50")
class ResNet50(ResNetEncoder):
    __doc__ = ResNetEncoder.__doc__
    arch = "resnet50"
