"""Paired batches: a source batch (inputs, labels, optional weights) and a target batch (inputs only).

Source and target are cycled *independently*: each has its own shuffled order, reshuffled when it runs out, so the
smaller domain never ends an epoch and a batch larger than a domain simply wraps around. Tensors already in memory
are indexed directly on the training device (no DataLoader, no per-batch collation); data that does not fit goes
through :class:`LoaderBatches`, which cycles two ordinary ``DataLoader``s.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable, Iterator, Optional

import torch

from .pair import TrainingData


@dataclass
class Batch:
    x_src: torch.Tensor  # (B, *input_shape)
    y_src: torch.Tensor  # (B,) int64
    x_tgt: torch.Tensor  # (B, *input_shape)
    w_src: Optional[torch.Tensor] = None  # (B,) per-sample source weights, None = uniform


class _Stream:
    """Endless shuffled indices over ``n`` items drawn ``size`` at a time from a private generator.

    The order is drawn on the CPU (one generator, the same numbers on every device) and moved to the device once
    per pass, so that a batch is a slice of it: no per-batch copy or transfer.
    """

    def __init__(self, n: int, size: int, seed: int, device):
        self.n, self.size, self.device = n, size, torch.device(device)
        self.gen = torch.Generator().manual_seed(seed)
        self._new_order()

    def _new_order(self) -> None:
        self.order = torch.randperm(self.n, generator=self.gen).to(self.device)
        self.pos = 0

    def next(self) -> torch.Tensor:
        if self.pos + self.size <= self.n:  # the common case: one slice
            idx = self.order[self.pos:self.pos + self.size]
            self.pos += self.size
            return idx
        parts, need = [], self.size
        while need > 0:
            if self.pos == self.n:
                self._new_order()
            take = min(need, self.n - self.pos)
            parts.append(self.order[self.pos:self.pos + take])
            self.pos += take
            need -= take
        return torch.cat(parts)

    def state_dict(self) -> dict:
        return {"gen": self.gen.get_state(), "order": self.order.cpu().clone(), "pos": self.pos}

    def check_state(self, s: dict, name: str) -> None:
        """Refuse a saved state this stream could not have written (ValueError naming ``name.field``, the value and
        the accepted range): positions within the data, the order a permutation of its ``n`` indices."""
        if not isinstance(s, dict) or set(s) != {"gen", "order", "pos"}:
            raise ValueError(f"{name!r} must be a dict with 'gen', 'order' and 'pos'; got "
                             f"{sorted(s) if isinstance(s, dict) else type(s).__name__}")
        pos = s["pos"]
        if isinstance(pos, bool) or not isinstance(pos, int) or not 0 <= pos <= self.n:
            raise ValueError(f"'{name}.pos' is {pos!r}; accepted: an integer in [0, {self.n}] (the position in a "
                             f"pass over the {self.n} {name} samples)")
        order = s["order"]
        if not (isinstance(order, torch.Tensor) and order.dtype == torch.int64 and order.shape == (self.n,)):
            got = f"a {order.dtype} tensor of shape {tuple(order.shape)}" if isinstance(order, torch.Tensor) else order
            raise ValueError(f"'{name}.order' is {got!r}; accepted: an int64 tensor of shape ({self.n},)")
        if self.n and not (bool(order.min() >= 0) and bool(order.max() < self.n)
                           and bool(torch.bincount(order, minlength=self.n).eq(1).all())):
            raise ValueError(f"'{name}.order' is not a permutation of the indices [0, {self.n - 1}] (values in "
                             f"[{int(order.min())}, {int(order.max())}])")
        gen, like = s["gen"], self.gen.get_state()
        if not (isinstance(gen, torch.Tensor) and gen.dtype == like.dtype and gen.shape == like.shape):
            raise ValueError(f"'{name}.gen' is not a generator state; accepted: a {like.dtype} tensor of shape "
                             f"{tuple(like.shape)}")

    def load_state_dict(self, s: dict) -> None:
        self.gen.set_state(s["gen"])
        self.order = s["order"].clone().to(self.device)
        self.pos = int(s["pos"])


class PairedBatches:
    """In-memory paired batching over a :class:`TrainingData`.

    Example:
        >>> import torch
        >>> data = TrainingData(torch.randn(5, 2), torch.tensor([0, 1, 0, 1, 0]), torch.randn(3, 2))
        >>> b = PairedBatches(data, batch_size=4, seed=0).next()
        >>> tuple(b.x_src.shape), tuple(b.x_tgt.shape)   # 4 > 3 target samples: wraps around
        ((4, 2), (4, 2))
    """

    def __init__(self, data: TrainingData, batch_size: int, seed: int, device="cpu"):
        self.device = torch.device(device)
        self.xs = data.source_x.to(self.device)
        self.ys = data.source_y.to(self.device)
        self.ws = None if data.source_w is None else data.source_w.to(self.device)
        self.xt = data.target_x.to(self.device)
        self.batch_size = batch_size
        self.src = _Stream(self.xs.shape[0], batch_size, seed * 2 + 1, self.device)
        self.tgt = _Stream(self.xt.shape[0], batch_size, seed * 2 + 2, self.device)

    def next(self) -> Batch:
        i, j = self.src.next(), self.tgt.next()
        return Batch(self.xs[i], self.ys[i], self.xt[j], None if self.ws is None else self.ws[i])

    def state_dict(self) -> dict:
        return {"source": self.src.state_dict(), "target": self.tgt.state_dict()}

    def load_state_dict(self, s: dict) -> None:
        """Restore the positions saved by :meth:`state_dict`, after checking both against the data (ValueError
        naming the field, e.g. ``'source.pos' is 1000000; accepted: an integer in [0, 40]``)."""
        if not isinstance(s, dict) or set(s) != {"source", "target"}:
            raise ValueError(f"the batch state must be a dict with 'source' and 'target'; got "
                             f"{sorted(s) if isinstance(s, dict) else type(s).__name__}")
        self.src.check_state(s["source"], "source")
        self.tgt.check_state(s["target"], "target")
        self.src.load_state_dict(s["source"])
        self.tgt.load_state_dict(s["target"])


class LoaderBatches:
    """Paired batches from two iterables (typically ``DataLoader``s) for data that is not in memory.

    The source loader yields ``(x, y)`` or ``(x, y, w)``; the target loader yields ``x`` or a tuple whose first
    item is ``x`` (anything else it yields, such as labels, is dropped here and never reaches training). Each is
    restarted when exhausted. Resuming replays the number of batches already drawn, which reproduces the
    stream exactly only when the loaders' shuffling is seeded.
    """

    def __init__(self, source: Iterable, target: Iterable, device="cpu"):
        self.source, self.target = source, target
        self.device = torch.device(device)
        self._src_it: Optional[Iterator] = None
        self._tgt_it: Optional[Iterator] = None
        self.drawn = 0

    @staticmethod
    def _cycle(loader: Iterable, it: Optional[Iterator]):
        if it is not None:
            try:
                return next(it), it
            except StopIteration:
                pass
        it = iter(loader)
        try:
            return next(it), it
        except StopIteration:
            raise ValueError("a loader yielded no batches; each domain needs at least one sample.") from None

    def next(self) -> Batch:
        s, self._src_it = self._cycle(self.source, self._src_it)
        t, self._tgt_it = self._cycle(self.target, self._tgt_it)
        self.drawn += 1
        if not isinstance(s, (tuple, list)) or len(s) not in (2, 3):
            raise ValueError("the source loader must yield (x, y) or (x, y, w) batches.")
        xt = t[0] if isinstance(t, (tuple, list)) else t
        d = self.device
        w = s[2].to(d) if len(s) == 3 else None
        return Batch(s[0].to(d).float(), s[1].to(d).long(), xt.to(d).float(), w)

    def state_dict(self) -> dict:
        return {"drawn": self.drawn}

    def load_state_dict(self, s: dict) -> None:
        drawn = s.get("drawn") if isinstance(s, dict) else s
        if isinstance(drawn, bool) or not isinstance(drawn, int) or drawn < 0:
            raise ValueError(f"'drawn' is {drawn!r}; accepted: an integer >= 0 (batches drawn so far)")
        self._src_it = self._tgt_it = None
        self.drawn = 0
        for _ in range(int(s["drawn"])):
            self.next()
