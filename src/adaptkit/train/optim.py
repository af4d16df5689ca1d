"""Optimiser settings shared by every update of a run, with per-update overrides."""
from __future__ import annotations

from dataclasses import dataclass, field, fields, replace
from typing import Any, Dict, List, Sequence

import torch

from .._checks import build_options, check_choice, check_known, check_number
from .schedules import lr_schedule

FLOAT32_MAX = float(torch.finfo(torch.float32).max)  # 3.4028234663852886e+38


@dataclass
class OptimSettings:
    name: str = "sgd"  # sgd | adam
    lr: float = 0.01  # base learning rate (DANN, Ganin et al. JMLR 2016 §5.2.2: μ0 = 0.01)
    momentum: float = 0.9  # SGD momentum (DANN: 0.9)
    weight_decay: float = 0.0  # L2 penalty
    betas: List[float] = field(default_factory=lambda: [0.9, 0.999])  # Adam's β1, β2
    schedule: str = "constant"  # learning-rate factor over each stage: constant | cosine | dann_anneal (LR_SCHEDULES)

    def validate(self, owner: str = "optim") -> "OptimSettings":
        check_choice("name", owner, self.name, ["adam", "sgd"])
        # torch's optimisers turn lr and weight_decay into float32 scalars: beyond float32's largest value they
        # fail mid-step ("value cannot be converted to type float without overflow")
        check_number("lr", owner, self.lr, low=0, low_open=True, high=FLOAT32_MAX)
        check_number("momentum", owner, self.momentum, low=0, high=1, high_open=True)
        check_number("weight_decay", owner, self.weight_decay, low=0, high=FLOAT32_MAX)
        lr_schedule(self.schedule, owner)  # learning-rate schedules only: dann_ramp is a weight schedule
        if len(self.betas) != 2:
            raise ValueError(f"The 'betas' parameter of {owner} must hold two numbers; got {list(self.betas)!r}.")
        for b in self.betas:
            check_number("betas", owner, b, low=0, high=1, high_open=True)
        return self

    @classmethod
    def from_dict(cls, d: Dict[str, Any], owner: str = "optim") -> "OptimSettings":
        return build_options(cls, owner, dict(d)).validate(owner)

    def with_overrides(self, overrides: Dict[str, Any], owner: str) -> "OptimSettings":
        if not overrides:
            return self
        check_known(overrides, [f.name for f in fields(self)], noun="optimiser setting", where=f"in {owner}")
        return replace(self, **overrides).validate(owner)


def parameter_groups(modules: Sequence[torch.nn.Module], params: Sequence[torch.nn.Parameter]) -> List[Dict[str, Any]]:
    """``params`` split into optimiser parameter groups by learning-rate scale, each ``{"params", "lr_scale"}``.

    A module anywhere inside ``modules`` may declare ``lr_scales() -> {parameter: scale}`` (a pretrained backbone
    fine-tuned at a tenth of the head's rate: :class:`adaptkit.nets.resnet.ResNetEncoder`); unlisted parameters
    have scale 1. Groups come in order of each scale's first parameter, and keep ``params``' order within, so one
    scale gives one group holding ``params`` as they are."""
    scales: Dict[int, float] = {}
    for m in modules:
        for sub in m.modules():
            declared = getattr(sub, "lr_scales", None)
            if callable(declared):
                scales.update({id(p): float(v) for p, v in declared().items()})
    groups: Dict[float, List[torch.nn.Parameter]] = {}
    for p in params:
        groups.setdefault(scales.get(id(p), 1.0), []).append(p)
    # a group at the run's own rate carries no "lr_scale" key: such optimisers (and checkpoints) are as before
    return [{"params": ps, **({} if scale == 1.0 else {"lr_scale": scale})} for scale, ps in groups.items()]


def make_optimizer(params: Sequence[Any], s: OptimSettings) -> torch.optim.Optimizer:
    """The torch optimiser ``s`` describes over ``params``: SGD with momentum or Adam, with L2 weight decay.

    ``params`` may be parameter groups from :func:`parameter_groups`: each group's rate is ``s.lr × lr_scale``."""
    params = list(params)
    if params and isinstance(params[0], dict):
        params = [{**g, "lr": s.lr * g.get("lr_scale", 1.0)} for g in params]
    if s.name == "sgd":
        return torch.optim.SGD(params, lr=s.lr, momentum=s.momentum, weight_decay=s.weight_decay)
    return torch.optim.Adam(params, lr=s.lr, betas=tuple(s.betas), weight_decay=s.weight_decay)
