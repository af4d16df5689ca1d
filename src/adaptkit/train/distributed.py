"""One run over several processes (``torchrun --nproc_per_node=N $(which adaptkit-train) ...``): the process
group, the global batch split across ranks, and features gathered with gradients.

How a step runs on N processes, so that it computes what one process computes on the same global batch:

* Every rank draws the **same global batch** (the seeded streams of :class:`~adaptkit.data.batches.PairedBatches`
  are identical on every rank), so labels, weights and batch positions are those of a 1-process run, and a
  checkpoint does not depend on the world size.
* Inside an update, :meth:`AdaptedModel.features` encodes only **this rank's slice** of the rows it is given
  (rank r: rows ``[r·b, (r+1)·b)`` of ``N·b``) and returns the features of all rows, gathered from every rank
  (:class:`GatherRows`, with gradients). So methods see global-batch features and compute their losses — the
  cross-entropy, MMD's and CORAL's statistics, the discriminator's batch, CDAN's maps, MCD's heads — on the
  global batch, unchanged; the loop stays method-agnostic. Rows not divisible by N are encoded whole on every
  rank (replicated: slower, still exact).
* **Gradients.** Every rank computes the same global loss L. The gather's backward sums the gradient of each
  rank's copy of L with respect to this rank's slice (a reduce-scatter), i.e. N·∂L/∂f_r; the loop then averages
  every declared parameter's gradient over the ranks (what DistributedDataParallel does), so the encoder receives
  (1/N)·Σ_r N·∂L/∂f_r·∂f_r/∂θ = ∂L/∂θ and the head and discriminator, computed identically everywhere, keep their
  ∂L/∂θ: no loss scaling is needed (checked against torch.autograd in tests/train/test_distributed.py).
  The averaging is done by :meth:`Distributed.average_gradients` rather than by wrapping the model in
  ``DistributedDataParallel``: the wrapper needs every forward through its own ``forward`` and one backward per
  forward, while an update here calls ``features``/``head`` directly and a step runs several updates, each on its
  own parameters (MCD: three, one repeated).
* **RNG.** The global generators stay identical on every rank (same seed, same draws), so everything computed on
  the whole global batch (a head's dropout, ADR's samples, random maps) is the same everywhere and the same as in
  one process. The encoder's own slice draws from a private generator seeded by (run seed, step, call, rank), so
  an encoder's dropout masks differ between slices; they are not those of a 1-process run.
* **BatchNorm** in the encoder normalises by the statistics of this rank's slice (as DDP without SyncBatchNorm);
  after each update the running means and variances are averaged over the ranks, so every rank holds the same
  buffers (the running mean then equals one process's exactly; the running variance approximately).
* Rank 0 alone writes the run folder; the other ranks train with no folder and stop with it.
"""
from __future__ import annotations

import contextlib
import os
from typing import Iterable, List, Optional

import torch
import torch.distributed as dist
from torch import nn

WORLD_SIZE_VARS = ("WORLD_SIZE", "RANK", "LOCAL_RANK")  # what torchrun sets in every worker


class GatherRows(torch.autograd.Function):
    """Concatenate every rank's rows, with gradients: forward ``(b, *) → (N·b, *)`` (an all-gather in rank order);
    backward returns this rank's rows of the gradient summed over ranks (a reduce-scatter; on gloo, which has none,
    an all-reduce and a slice)."""

    @staticmethod
    def forward(ctx, x: torch.Tensor) -> torch.Tensor:
        ctx.rank, ctx.world, ctx.rows = dist.get_rank(), dist.get_world_size(), x.shape[0]
        parts = [torch.empty_like(x) for _ in range(ctx.world)]
        dist.all_gather(parts, x.contiguous())
        return torch.cat(parts)  # (N·b, *)

    @staticmethod
    def backward(ctx, g: torch.Tensor):
        g = g.contiguous()
        if dist.get_backend() == dist.Backend.NCCL:
            out = torch.empty_like(g[:ctx.rows])
            dist.reduce_scatter_tensor(out, g)
            return out
        dist.all_reduce(g)  # (N·b, *), summed over ranks
        return g[ctx.rank * ctx.rows:(ctx.rank + 1) * ctx.rows].clone()


def gather_rows(x: torch.Tensor) -> torch.Tensor:
    """:class:`GatherRows` where gradients are wanted, a plain all-gather otherwise."""
    if x.requires_grad:
        return GatherRows.apply(x)
    parts = [torch.empty_like(x) for _ in range(dist.get_world_size())]
    dist.all_gather(parts, x.contiguous())
    return torch.cat(parts)


def _env_world_size() -> int:
    value = os.environ.get("WORLD_SIZE", "1")
    try:
        return int(value)
    except ValueError:
        raise ValueError(f"the environment variable WORLD_SIZE must be a whole number of processes (torchrun sets "
                         f"it); got {value!r}.") from None


class Distributed:
    """The process group of one run, as the loop sees it: rank, world size, and the few collectives a step needs.

    Build it with :func:`current` (from torchrun's environment); a 1-process run has none and the loop's code
    paths for it are skipped.
    """

    def __init__(self, seed: int = 0):
        self.rank, self.world_size = dist.get_rank(), dist.get_world_size()
        self.seed = int(seed)
        self._step, self._calls = 0, 0

    @property
    def is_main(self) -> bool:
        return self.rank == 0

    # -- checks ------------------------------------------------------------------------------------------------
    def check_batch_size(self, batch_size: int) -> None:
        """Refuse a batch that the processes cannot share equally (one line, both numbers named)."""
        if batch_size % self.world_size:
            raise ValueError(f"batch_size={batch_size} is not divisible by the world size {self.world_size} "
                             f"(torchrun --nproc_per_node): each process encodes batch_size / world_size rows of "
                             f"every batch; use a batch_size that is a multiple of {self.world_size}, or a number "
                             f"of processes that divides {batch_size}.")

    # -- one update ----------------------------------------------------------------------------------------------
    @contextlib.contextmanager
    def gathering(self, model, step: int):
        """Inside the block, ``model.features`` encodes this rank's slice and returns the gathered global features."""
        if step != self._step:
            self._step, self._calls = step, 0
        model._features_hook = self._encode
        try:
            yield
        finally:
            model._features_hook = None

    def _encode(self, encoder: nn.Module, x: torch.Tensor) -> torch.Tensor:
        n, w = x.shape[0], self.world_size
        self._calls += 1
        if n % w:  # replicated: every rank encodes all rows (the same numbers everywhere)
            return encoder(x)
        b = n // w
        devices = [x.device] if x.device.type == "cuda" else []
        with torch.random.fork_rng(devices=devices):  # the shared generators do not move; this slice's own stream
            torch.manual_seed(hash((self.seed, self._step, self._calls, self.rank)) % (2 ** 63))
            f = encoder(x[self.rank * b:(self.rank + 1) * b])  # (b, F)
        return gather_rows(f)  # (N·b, F)

    def average_gradients(self, params: List[torch.Tensor]) -> None:
        """Replace each parameter's gradient by its mean over the ranks (one flat all-reduce). A gradient that is
        None on this rank is None on every rank (the same graph everywhere)."""
        self._mean_over_ranks([p.grad for p in params if p.grad is not None])

    def sync_norm_buffers(self, modules: Iterable[nn.Module]) -> None:
        """Average BatchNorm running means and variances over the ranks (each normalised its own slice)."""
        norms = [mod for m in modules for mod in m.modules() if isinstance(mod, nn.modules.batchnorm._NormBase)]
        self._mean_over_ranks([b for mod in norms for b in (mod.running_mean, mod.running_var) if b is not None])

    def _mean_over_ranks(self, tensors: List[torch.Tensor]) -> None:
        """Each tensor, in place, replaced by its mean over the ranks: one flat all-reduce for all of them."""
        if not tensors:
            return
        flat = torch.cat([t.reshape(-1) for t in tensors])
        dist.all_reduce(flat)
        flat /= self.world_size
        offset = 0
        for t in tensors:
            t.copy_(flat[offset:offset + t.numel()].view_as(t))
            offset += t.numel()

    # -- step boundaries -----------------------------------------------------------------------------------------
    def any_rank(self, flag: int) -> int:
        """The largest ``flag`` over the ranks (a stop requested on any rank stops all at the same step)."""
        t = torch.tensor([int(flag)], dtype=torch.int64)
        dist.all_reduce(t, op=dist.ReduceOp.MAX)
        return int(t)

    def broadcast_state(self, modules: Iterable[nn.Module]) -> None:
        """Every rank takes rank 0's parameters and buffers (they are equal already when seeds are; this makes
        sure, as DistributedDataParallel does when it wraps a model)."""
        for m in modules:
            for t in list(m.parameters()) + list(m.buffers()):
                dist.broadcast(t.data, 0)

    def barrier(self) -> None:
        dist.barrier()


_CURRENT: Optional[Distributed] = None


def current(seed: int = 0, device: Optional[torch.device] = None) -> Optional[Distributed]:
    """The run's :class:`Distributed` under torchrun (``WORLD_SIZE`` > 1 in the environment), else None.

    Joins the process group on first use (gloo on the CPU, nccl on CUDA; torchrun's ``MASTER_ADDR``/``PORT``) and
    makes this rank's GPU (``LOCAL_RANK``) the current one, so ``device=cuda`` means it.
    """
    global _CURRENT
    if _env_world_size() <= 1:
        return None
    if not dist.is_initialized():
        cuda = device is not None and device.type == "cuda"
        if cuda:
            torch.cuda.set_device(int(os.environ.get("LOCAL_RANK", "0")))
        dist.init_process_group(backend="nccl" if cuda else "gloo")
    if _CURRENT is None:
        _CURRENT = Distributed(seed)
    _CURRENT.seed = int(seed)
    return _CURRENT


def rank() -> int:
    """This process's rank under torchrun (0 otherwise), read from the environment: no process group needed."""
    try:
        return int(os.environ.get("RANK", "0"))
    except ValueError:
        return 0


def setup_run(config) -> Optional[Distributed]:
    """The process group for a resolved run config under torchrun (None in one process), after refusing what it
    cannot train: a batch the processes cannot share equally, a guarded run (several candidate runs, one folder
    each: not distributed yet)."""
    from ..config import AUTO, resolve_device

    group = current(config.seed, resolve_device(config.device))
    if group is None:
        return None
    group.check_batch_size(int(config.batch_size))
    if config.guard or config.method.get("weight") == AUTO:
        raise ValueError(f"guard=true and method.weight=auto train several candidate runs; they run in one "
                         f"process only, not under torchrun (world size {group.world_size}). Run them without "
                         "torchrun, or train one method with a fixed weight.")
    return group


def follow(trainer, run_dir) -> dict:
    """What a rank other than 0 does with a run: wait until rank 0 has prepared the run folder, resume from its
    checkpoint when there is one (read with ``weights_only``, checked like rank 0's), train in step with rank 0,
    and return the summary. It writes nothing; rank 0 runs the post-training phase and writes every file."""
    from pathlib import Path

    from .loop import CHECKPOINT, load_checkpoint

    trainer.distributed.barrier()  # rank 0 has emptied (overwrite) or checked the folder
    if run_dir is not None and (Path(run_dir) / CHECKPOINT).exists():
        path = Path(run_dir) / CHECKPOINT
        trainer.load_state_dict(load_checkpoint(path), source=str(path))
    return trainer.run()
