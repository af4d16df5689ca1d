"""Numeric precision of the training forward passes: the ``precision`` run setting.

``float32`` (the default, and the only choice on the CPU) runs everything in float32. ``bf16`` runs each update's
loss — the forward passes of the encoder, head and the method's own networks — under CUDA autocast with
``torch.bfloat16``; the backward pass, the optimiser states and the parameters stay float32, and bf16's float32
exponent range needs no gradient scaler. Evaluation, selection scores and diagnostics always run in float32.

What stays float32 under ``bf16``, and why:

- autocast's own policy: it runs ``cross_entropy``, ``log_softmax``, ``softmax``, ``binary_cross_entropy_with_logits``,
  ``exp``, ``log``, ``sum`` and ``pow`` in float32 (PyTorch's "CUDA Ops that can autocast to float32" list, in the
  Automatic Mixed Precision docs), so source CE, domain BCE, entropy and KL terms are float32 already;
- matrix products are *not* on that list: they would run in bf16, whose 8-bit mantissa (about 3 significant
  digits) is too coarse for the differences of large numbers a kernel or a covariance is made of
  (‖a‖² + ‖b‖² − 2a·b in MMD; DᵀD − (1ᵀD)ᵀ(1ᵀD)/n in CORAL). :func:`float32_loss` marks such losses: it switches
  autocast off inside them and casts their floating inputs to float32 (``losses.mmd2``, ``losses.coral_distance``).

Example:
    >>> import torch
    >>> with autocast_for("float32", torch.device("cpu")):
    ...     pass
"""
from __future__ import annotations

import contextlib
import functools
from typing import Any, Callable, TypeVar

import torch

PRECISIONS = ("float32", "bf16")  # accepted values of the precision setting
F = TypeVar("F", bound=Callable[..., Any])


def check_precision(precision: Any, owner: str = "the run settings") -> str:
    """``precision`` when it is one of :data:`PRECISIONS`; else a ValueError naming the value and the choices."""
    if precision not in PRECISIONS:
        raise ValueError(f"The 'precision' parameter of {owner} must be one of {{{', '.join(map(repr, PRECISIONS))}}}. "
                         f"Got {precision!r} instead.")
    return precision


def check_precision_on(precision: str, device: torch.device) -> None:
    """Refuse ``bf16`` on a device other than CUDA, in one line: on the CPU, bf16 matrix products are slower than
    float32 on most processors and less accurate, so adaptkit does not offer them. Called where the run's device is
    known (a sweep may be composed on a machine without the GPUs its runs go to)."""
    check_precision(precision)
    if precision == "bf16" and torch.device(device).type != "cuda":
        raise ValueError(f"The 'precision' parameter of the run settings is 'bf16', which needs a CUDA device; this "
                         f"run's device is {str(device)!r}. Use precision=float32 there (the default).")


def autocast_for(precision: str, device: torch.device):
    """The context the loop runs each update's loss in: CUDA autocast to bfloat16 for ``bf16``, nothing for
    ``float32``. Refuses ``bf16`` off CUDA (:func:`check_precision_on`)."""
    check_precision_on(precision, device)
    if precision == "bf16":
        return torch.autocast(device_type="cuda", dtype=torch.bfloat16)
    return contextlib.nullcontext()


def _autocast_on(device_type: str) -> bool:
    try:
        return bool(torch.is_autocast_enabled(device_type))  # torch >= 2.4
    except TypeError:  # older torch: one query per device type
        return bool(torch.is_autocast_cpu_enabled() if device_type == "cpu" else
                    device_type == "cuda" and torch.is_autocast_enabled())


def float32_loss(fn: F) -> F:
    """Run ``fn`` in float32 whatever autocast is active (see the module docstring): autocast is switched off for
    the device types of the inputs and every floating tensor argument is cast to float32. The result is then float32,
    and so is its gradient's arithmetic; outside autocast with float32 inputs this changes nothing.

    Example:
        >>> @float32_loss
        ... def gram(a): return a @ a.T
        >>> with torch.autocast("cpu", dtype=torch.bfloat16):
        ...     gram(torch.ones(2, 3)).dtype
        torch.float32
    """

    def cast(v: Any) -> Any:
        return v.float() if isinstance(v, torch.Tensor) and v.is_floating_point() else v

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        types = {v.device.type for v in (*args, *kwargs.values()) if isinstance(v, torch.Tensor)}
        active = [t for t in types if _autocast_on(t)]
        if not active:
            return fn(*args, **kwargs)
        with contextlib.ExitStack() as stack:
            for t in active:
                stack.enter_context(torch.autocast(device_type=t, enabled=False))
            return fn(*[cast(a) for a in args], **{k: cast(v) for k, v in kwargs.items()})

    return wrapper  # type: ignore[return-value]
