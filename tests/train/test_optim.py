"""The optimiser factory (adaptkit/train/optim.py): one step of each optimiser against its published update rule."""
import re

import numpy as np
import pytest
import torch

from adaptkit.train.optim import OptimSettings, make_optimizer


def _one_step(settings, p0, g):
    p = torch.nn.Parameter(p0.clone())
    opt = make_optimizer([p], settings)
    p.grad = g.clone()
    opt.step()
    return p.detach()


def test_sgd_step_is_the_momentum_rule():
    # first step of SGD with momentum and L2 decay: v = g + wd·p, p ← p − lr·v (momentum buffer starts at v)
    p0, g = torch.tensor([1.0, -2.0]), torch.tensor([0.5, 0.25])
    s = OptimSettings(name="sgd", lr=0.1, momentum=0.9, weight_decay=0.01)
    torch.testing.assert_close(_one_step(s, p0, g), p0 - 0.1 * (g + 0.01 * p0))


def test_adam_step_is_kingma_and_ba_algorithm_1():
    # first step (Kingma & Ba, ICLR 2015, Algorithm 1): m̂ = g, v̂ = g², p ← p − lr·m̂/(√v̂ + ε)
    p0, g = torch.tensor([1.0, -2.0, 0.5]), torch.tensor([0.5, -0.25, 3.0])
    s = OptimSettings(name="adam", lr=0.01, betas=[0.5, 0.999])
    torch.testing.assert_close(_one_step(s, p0, g), p0 - 0.01 * g / (g.abs() + 1e-8))


@pytest.mark.parametrize("change, message", [
    ({"name": "rmsprop"}, "The 'name' parameter of optim must be one of {'adam', 'sgd'}. Got 'rmsprop' instead."),
    ({"lr": 0}, "The 'lr' parameter of optim must be in the range (0, 3.4028234663852886e+38]. Got 0 instead."),
    # torch's optimisers hold lr as a float32 scalar: its largest value is numpy's np.finfo(np.float32).max
    ({"lr": 1e308}, f"The 'lr' parameter of optim must be in the range (0, {float(np.finfo(np.float32).max)}]. "
                    "Got 1e+308 instead."),
    ({"momentum": 1.0}, "The 'momentum' parameter of optim must be in the range [0, 1). Got 1.0 instead."),
    ({"weight_decay": -1}, "The 'weight_decay' parameter of optim must be in the range [0, 3.4028234663852886e+38]."),
    ({"betas": [0.9]}, "The 'betas' parameter of optim must hold two numbers"),
    ({"schedule": "dann_ramp"}, "The 'schedule' parameter of optim must be one of {'constant', 'cosine', "
                                "'dann_anneal'}. Got 'dann_ramp' instead."),
    ({"lrr": 0.1}, "Unknown option 'lrr' for optim. Accepted options: name, lr, momentum"),
])
def test_bad_settings_are_refused_naming_them(change, message):
    with pytest.raises((ValueError, TypeError), match=re.escape(message)):
        OptimSettings.from_dict(change)


def test_per_update_overrides_are_checked():
    base = OptimSettings()
    assert base.with_overrides({"name": "adam", "lr": 2e-4}, "update 'd'").name == "adam"
    assert base.with_overrides({}, "update 'd'") is base
    with pytest.raises(ValueError, match=re.escape("Unknown optimiser setting 'momentun' in update 'd'. Accepted "
                                                   "optimiser settings: name, lr, momentum")):
        base.with_overrides({"momentun": 0.5}, "update 'd'")
