"""Contract tests over every registered encoder and head (ids = registry names: `pytest -k small_cnn` works):
each builds, reports its feature width truthfully, takes a training step on the CPU, and refuses an invalid value
of each of its options naming that option."""
import dataclasses
import re

import pytest
import torch

from adaptkit.nets import ENCODERS, HEADS, build_encoder, build_head, feature_size

# shapes each encoder accepts (the ResNets at their smallest, 16 pixels a side, to keep the contract cheap on a CPU)
INPUT_SHAPES = {"mlp": [(5,), (2, 3)], "small_cnn": [(1, 8, 8), (64,), (3, 16, 16)],
                "resnet18": [(3, 16, 16), (1, 16, 16)], "resnet50": [(3, 16, 16)],
                "lenet": [(1, 28, 28), (3, 32, 32), (256,)]}
# an invalid value for every option of every component: a new option must add its line here
INVALID = {
    ("encoder", "mlp"): {"hidden": [8, 0], "features": 0, "dropout": 1.0},
    ("encoder", "small_cnn"): {"channels": [16], "features": -1, "in_channels": 2},
    ("encoder", "resnet18"): {"weights_path": "/no/such/dir/weights.pt", "bottleneck": -1, "freeze": "yes",
                              "backbone_lr_scale": 0},
    ("encoder", "resnet50"): {"weights_path": 3, "bottleneck": 2.5, "freeze": 1, "backbone_lr_scale": 1.5},
    ("encoder", "lenet"): {"channels": [20, 50, 80], "features": 0, "in_channels": 4},
    ("head", "linear"): {},
    ("head", "mlp"): {"hidden": [0], "dropout": -0.1},
}


def test_every_registered_component_has_its_test_table_entries():
    assert set(INPUT_SHAPES) == set(ENCODERS.names())
    assert set(INVALID) == {("encoder", n) for n in ENCODERS.names()} | {("head", n) for n in HEADS.names()}
    for (group, name), bad in INVALID.items():
        cls = (ENCODERS if group == "encoder" else HEADS).get(name)
        assert set(bad) == {f.name for f in dataclasses.fields(cls.Options)}, (group, name)


def _check_step(module, x, out_width):
    """One SGD step on a squared-output loss: every parameter gets a finite gradient and moves."""
    before = [p.detach().clone() for p in module.parameters()]
    y = module(x)
    assert y.shape == (x.shape[0], out_width) and torch.isfinite(y).all()
    y.pow(2).mean().backward()
    torch.optim.SGD(module.parameters(), lr=0.1).step()
    moved = [not torch.equal(b, p) for b, p in zip(before, module.parameters())]
    assert any(moved) and all(p.grad is not None and torch.isfinite(p.grad).all() for p in module.parameters())


@pytest.mark.parametrize("name", ENCODERS.names())
def test_encoder_builds_reports_its_width_and_steps(name):
    torch.manual_seed(0)
    for shape in INPUT_SHAPES[name]:
        enc = build_encoder(name, shape)
        d = feature_size(enc, shape)
        assert d == enc.out_features  # the declared width is the real one (a dummy forward pass agrees)
        with torch.no_grad():
            assert enc.eval()(torch.zeros(2, *shape)).shape == (2, d)
        _check_step(enc.train(), torch.randn(4, *shape), d)


@pytest.mark.parametrize("name", HEADS.names())
def test_head_maps_features_to_class_logits_and_steps(name):
    torch.manual_seed(0)
    head = build_head(name, 7, 3)
    _check_step(head, torch.randn(5, 7), 3)


@pytest.mark.parametrize("group, name, option", [(g, n, o) for (g, n), bad in INVALID.items() for o in bad],
                         ids=lambda v: str(v))
def test_an_invalid_option_value_is_refused_naming_the_option(group, name, option):
    value = INVALID[(group, name)][option]
    with pytest.raises((ValueError, TypeError), match=re.escape(f"'{option}' parameter of {group} '{name}'")):
        if group == "encoder":
            build_encoder(name, INPUT_SHAPES[name][0], **{option: value})
        else:
            build_head(name, 7, 3, **{option: value})


@pytest.mark.parametrize("group, name", list(INVALID), ids=lambda v: str(v))
def test_an_unknown_option_is_refused_with_the_accepted_list(group, name):
    with pytest.raises(ValueError, match=re.escape(f"Unknown option 'widht' for {group} '{name}'. Accepted options:")):
        if group == "encoder":
            build_encoder(name, INPUT_SHAPES[name][0], widht=3)
        else:
            build_head(name, 7, 3, widht=3)
