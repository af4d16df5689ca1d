"""Memory a run will need, estimated before anything is built, against the memory the device has free: a run
whose largest tensors cannot fit is refused in one line with the estimate and a way out, instead of failing inside
an allocation (or swapping the machine to a halt).

The estimate counts the largest tensors only, in float32 (4 bytes), rounded up rather than down where unsure:

- the two input batches gathered each step: 2 × batch × input size;
- the encoder's weights with their gradients and optimiser state (SGD with momentum: 3 copies, Adam: 4), and its
  activations kept for the backward pass, for both domains (:meth:`memory_sizes` of a registered encoder);
- what the method builds per batch (:meth:`adaptkit.methods.base.Alignment.memory_needs`; MMD's kernel matrices).

Free memory: ``torch.cuda.mem_get_info`` on a GPU; ``MemAvailable`` of ``/proc/meminfo`` on the CPU (Linux's
estimate of what can be allocated without swapping, proc(5)), else ``os.sysconf`` free pages × page size.
"""
from __future__ import annotations

import math
import os
from dataclasses import dataclass
from typing import Any, List, Optional, Tuple

FLOAT = 4  # bytes of a float32


@dataclass(frozen=True)
class Need:
    """One of the largest tensors a run builds: what it is, its bytes, and how to make it smaller."""

    what: str
    bytes: int
    advice: str


def gib(n: float) -> str:
    return f"{n / 2**30:.1f} GiB" if n >= 2**30 / 10 else f"{n / 2**20:.0f} MiB"


def available(device) -> Tuple[Optional[int], str]:
    """``(bytes free on device, where the figure comes from)``; ``(None, why)`` when it cannot be known."""
    import torch

    if device.type == "cuda":
        free, _ = torch.cuda.mem_get_info(device)
        return int(free), f"free on {device}, torch.cuda.mem_get_info"
    if device.type != "cpu":
        return None, f"free memory of {device} unknown"
    try:
        with open("/proc/meminfo", encoding="ascii") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024, "MemAvailable in /proc/meminfo"
    except (OSError, ValueError, IndexError):
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"), "free pages, os.sysconf"
    except (ValueError, OSError, AttributeError):
        return None, "free memory unknown"


def _optimizer_copies(optim) -> int:
    """Copies of each trained weight: the weight, its gradient, and the optimiser's state."""
    name = getattr(optim, "name", "sgd")
    return 4 if name == "adam" else 3 if getattr(optim, "momentum", 0) else 2


def encoder_needs(encoder_cls, input_shape, options: dict, batch_size: int, optim) -> List[Need]:
    """The encoder's weights (with gradients and optimiser state) and its activations for a batch of both domains,
    from a registered encoder's ``memory_sizes(input_shape, options) -> (parameters, floats kept per sample)``;
    nothing for an encoder that does not say."""
    sizes = getattr(encoder_cls, "memory_sizes", None)
    if sizes is None:
        return []
    try:
        n_params, per_sample = sizes(tuple(input_shape), dict(options))
    except Exception:  # noqa: BLE001 — bad options: the encoder's own checks will name them when it is built
        return []
    copies = _optimizer_copies(optim)
    return [Need(f"the encoder's {n_params:,} weights × {copies} (gradients, optimiser state)",
                 n_params * copies * FLOAT, "narrower or fewer encoder layers (encoder.hidden)"),
            Need(f"the encoder's activations for 2 × {batch_size} samples ({per_sample:,} floats each)",
                 2 * batch_size * per_sample * FLOAT, "a smaller batch_size")]


def run_needs(c, input_shape, method_obj, encoder_cls=None) -> List[Need]:
    """The largest tensors the resolved run config ``c`` will build, largest first."""
    b = int(c.batch_size)
    d_in = int(math.prod(input_shape))
    needs = [Need(f"the two input batches (2 × {b} × {d_in} values)", 2 * b * d_in * FLOAT, "a smaller batch_size")]
    if encoder_cls is not None:
        needs += encoder_needs(encoder_cls, input_shape, {k: v for k, v in c.encoder.items() if k != "name"}, b,
                               c.optim)
    needs += list(method_obj.memory_needs(b))
    return sorted(needs, key=lambda n: -n.bytes)


def check_fits(c, input_shape, method_obj, device, encoder_cls=None) -> None:
    """Refuse (ValueError, one line) a run whose largest tensors need more memory than ``device`` has free: the
    estimate, its largest parts, and the advice of the largest."""
    needs = run_needs(c, input_shape, method_obj, encoder_cls)
    total = sum(n.bytes for n in needs)
    free, source = available(device)
    if free is None or total <= free:
        return
    shown = "; ".join(f"{n.what}: {gib(n.bytes)}" for n in needs[:3] if n.bytes >= total / 100)
    fits = largest_batch(c, input_shape, method_obj, encoder_cls, free)
    hint = f" (a batch_size of at most {fits} fits)" if fits else ""
    raise ValueError(f"The run's largest tensors would need about {gib(total)} of memory on {device}, more than "
                     f"the {gib(free)} available ({source}): {shown}. Try {needs[0].advice}{hint}.")


def largest_batch(c, input_shape, method_obj, encoder_cls, free: int) -> Optional[int]:
    """The largest batch size below ``c.batch_size`` whose estimate fits in ``free`` bytes (bisection: the
    estimate grows with the batch); ``None`` when not even a batch of 1 fits (the weights alone are too large)."""
    import dataclasses

    def need(b: int) -> int:
        return sum(n.bytes for n in run_needs(dataclasses.replace(c, batch_size=b), input_shape, method_obj,
                                              encoder_cls))

    lo, hi = 1, int(c.batch_size)
    if need(lo) > free:
        return None
    while lo + 1 < hi:
        mid = (lo + hi) // 2
        lo, hi = (mid, hi) if need(mid) <= free else (lo, mid)
    return lo
