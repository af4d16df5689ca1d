"""The one mode helper, nets.modes.module_mode, against torch's own mode flags and autograd."""
import pytest
import torch
from torch import nn

from adaptkit.nets import module_mode


def _net():
    return nn.Sequential(nn.Linear(2, 3), nn.BatchNorm1d(3), nn.Dropout(0.5), nn.Linear(3, 1))


def test_frozen_runs_in_eval_without_grad_and_leaves_batchnorm_statistics_alone():
    net = _net().train()
    stats = net[1].running_mean.clone()
    x = torch.randn(8, 2, requires_grad=True)
    with module_mode(net, train=False, no_grad=True):
        assert not any(m.training for m in net.modules())
        y = net(x)
    assert not y.requires_grad  # torch.no_grad was on
    assert torch.equal(net[1].running_mean, stats)  # eval-mode batch norm does not update its statistics
    assert all(m.training for m in net.modules())


def test_forced_training_mode_keeps_autograd_and_restores_mixed_modes_even_on_error():
    net = _net().eval()
    net[2].train()  # a mixed state: only the dropout in training mode
    before = [m.training for m in net.modules()]
    x = torch.randn(8, 2, requires_grad=True)
    with pytest.raises(RuntimeError, match="boom"):
        with module_mode(net, train=True) as same:
            assert same is net and all(m.training for m in net.modules())
            assert net(x).requires_grad  # no_grad=False leaves autograd on
            raise RuntimeError("boom")
    assert [m.training for m in net.modules()] == before
