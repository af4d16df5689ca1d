"""One helper to run a block of code with a module in a chosen mode, restoring the modes it found."""
from __future__ import annotations

import contextlib
from typing import Iterator

import torch
from torch import nn


@contextlib.contextmanager
def module_mode(module: nn.Module, *, train: bool, no_grad: bool = False) -> Iterator[nn.Module]:
    """Run the block with ``module`` (and every submodule) in training (``train=True``) or eval mode, under
    ``torch.no_grad()`` when ``no_grad``; afterwards, even on error, every submodule is back in the mode it was in.

    Two uses: *frozen*, ``train=False, no_grad=True`` — a network that must not learn nor even move its batch-norm
    running statistics (ADDA's source encoder); *forced training mode*, ``train=True`` — dropout on whatever mode
    the caller left (ADR's two dropout samples). ``no_grad=False`` leaves autograd as the caller set it.

    Example:
        >>> net = nn.Sequential(nn.Linear(2, 2), nn.Dropout(0.5)).eval()
        >>> with module_mode(net, train=True):
        ...     net.training
        True
        >>> net.training
        False
    """
    saved = [(m, m.training) for m in module.modules()]  # pre-order: a parent before its children
    module.train(train)
    try:
        with torch.no_grad() if no_grad else contextlib.nullcontext():
            yield module
    finally:
        for m, was in saved:  # parents first, so each child ends in its own saved mode
            m.train(was)
