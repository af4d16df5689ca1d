"""The check before every optimiser step: exact for any magnitude, and what a skipped step counts.

References: IEEE 754 (binary32 overflows above about 3.4e38; multiplying by a power of two is exact barring
overflow and underflow); ``numpy.isfinite`` decides finiteness entry by entry, the reference for
:func:`adaptkit.train.loop.all_finite`.
"""
from __future__ import annotations

import math
import os
import signal
from dataclasses import dataclass

import numpy as np
import pytest
import torch

from adaptkit import fit
from adaptkit.methods.base import Alignment, Stage, Update
from adaptkit.train import loop
from adaptkit.train.loop import DivergenceError, Interrupted, _all_finite_by_norms, all_finite, load_checkpoint
from tests.conftest import moons_pair

SCALE = 2.0 ** 72  # ≈ 4.7e21: gradient entries near 1e20, finite; their squares (1e40) overflow float32


def _cases(seed: int):
    """Lists of tensors (several dtypes and sizes, magnitudes up to 3e38), some with one NaN/±inf planted."""
    g = np.random.default_rng(seed)
    for case in range(60):
        dtype = [torch.float32, torch.float64, torch.bfloat16, torch.float16][case % 4]
        top = {torch.float16: 6e4, torch.bfloat16: 3e38, torch.float32: 3e38, torch.float64: 1e300}[dtype]
        sizes = g.integers(0, 300, size=g.integers(1, 6))
        ts = [torch.from_numpy(g.standard_normal(n) * 10.0 ** g.uniform(-40, math.log10(top))).to(dtype)
              for n in sizes]
        ts = [t.clamp(-top, top) if dtype != torch.float64 else t for t in ts]
        if case % 3 and any(t.numel() for t in ts):
            t = next(t for t in ts[::-1] if t.numel())
            t[int(g.integers(t.numel()))] = [float("nan"), float("inf"), -float("inf")][case % 3 - 1 + (case % 2)]
        yield ts


def _bits(t: torch.Tensor) -> torch.Tensor:
    return t.view({2: torch.int16, 4: torch.int32, 8: torch.int64}[t.element_size()])


@pytest.mark.parametrize("check", [all_finite, _all_finite_by_norms], ids=["fused", "fallback"])
def test_the_check_agrees_with_numpy_isfinite_and_leaves_every_value_bit_identical(check):
    for ts in _cases(0):
        want = all(bool(np.isfinite(t.double().numpy()).all()) for t in ts)  # numpy, entry by entry
        before = [t.clone() for t in ts]
        assert check(ts) == want
        for a, b in zip(ts, before):
            nan = torch.isnan(b)
            assert torch.equal(torch.isnan(a), nan)
            # every number and infinity keeps its bits (a half/bfloat16 NaN may come back as another NaN: the
            # kernel converts through float32; such a step is never applied anyway)
            assert torch.equal(_bits(a)[~nan], _bits(b)[~nan])


def test_finite_values_whose_norms_overflow_are_finite():
    big = [torch.full((1000,), 1e20)]
    assert not math.isfinite(float(torch._foreach_norm(big)[0]))  # what a sum of 2-norms would have called NaN/inf
    assert all_finite(big) and _all_finite_by_norms(big)
    assert all_finite([torch.full((4,), 3.0e38), torch.full((4,), -3.0e38)])  # max-abs would not overflow either


class _Scaled(Alignment):
    """source_only with its loss multiplied by ``scale``."""

    name = "scaled"

    @dataclass
    class Options:
        scale: float = 1.0  # the factor on the loss (and so on every gradient)

    def stages(self):
        m, c = self.model, self.options.scale
        return [Stage("s", [Update("classify", [m.encoder, m.head], lambda b, t: (self.source_loss(b)[0] * c, {}))])]


def test_a_run_with_gradients_near_1e20_trains_exactly_like_the_same_run_at_scale_1():
    """Loss × 2^72 with lr / 2^72: every gradient is the unscaled one times 2^72 exactly and every SGD update is
    the same (IEEE 754: scaling by a power of two is exact), so the weights must match bit for bit; the old check
    (a float32 sum of 2-norms) stopped this run at its first step."""
    pair = moons_pair(n=60)
    kw = dict(steps=12, batch_size=16, eval_every=6, progress=False, device="cpu", seed=1)
    ref = fit(pair, method=_Scaled(scale=1.0), optim={"lr": 0.05}, **kw)
    for on_nonfinite in ("stop", "skip"):
        big = fit(pair, method=_Scaled(scale=SCALE), optim={"lr": 0.05 / SCALE}, on_nonfinite=on_nonfinite, **kw)
        assert big.summary["skipped_steps"] == big.summary["skipped_updates"] == 0
        for (name, a), b in zip(ref.model.state_dict().items(), big.model.state_dict().values()):
            assert torch.equal(a, b), name

    # the gradients really are where a sum of squares overflows: one step's gradients, as the loop sees them
    torch.manual_seed(0)
    model = ref.model
    model.zero_grad()
    (torch.nn.functional.cross_entropy(model(pair.source_train.x[:16]), pair.source_train.y[:16]) * SCALE).backward()
    grads = [p.grad for p in model.parameters()]
    assert max(float(g.abs().max()) for g in grads) > 1e19
    assert not math.isfinite(float(torch.stack(torch._foreach_norm(grads)).sum())) and all_finite(grads)


class _Breaks(Alignment):
    """source_only, except at the steps in ``at``: there the loss is NaN or inf, or it stays finite while the
    head's weight gets a NaN gradient (0·√|w − w|: value 0, derivative 0·∞) or an inf one (√(w − w): value 0,
    derivative 1/(2·0))."""

    name = "breaks"

    @dataclass
    class Options:
        at: tuple = ()  # 0-based steps that break
        how: str = "nan loss"  # nan loss | inf loss | nan gradient | inf gradient

    def stages(self):
        m, o = self.model, self.options

        def loss(batch, t):
            l = self.source_loss(batch)[0]
            if t.step not in o.at:
                return l, {}
            w = next(m.head.parameters())
            return {"nan loss": lambda: l * float("nan"), "inf loss": lambda: l * float("inf"),
                    "nan gradient": lambda: l + 0.0 * torch.sqrt((w - w.detach()).abs()).sum(),
                    "inf gradient": lambda: l + torch.sqrt(w - w.detach()).sum()}[o.how](), {}
        return [Stage("s", [Update("fragile", [m.encoder, m.head], loss)])]


@pytest.mark.parametrize("how", ["nan loss", "inf loss", "nan gradient", "inf gradient"])
def test_nan_and_inf_losses_and_gradients_stop_the_run_before_the_step_naming_update_step_and_parameter(how):
    pair = moons_pair(n=40)
    kw = dict(steps=5, batch_size=8, eval_every=50, progress=False, device="cpu")
    before = fit(pair, method=_Breaks(at=(), how=how), **{**kw, "steps": 3})  # the state step 3 starts from
    with pytest.raises(DivergenceError) as err:
        fit(pair, method=_Breaks(at=(3,), how=how), **kw)
    msg = str(err.value)
    assert "update 'fragile' in stage 's'" in msg and "at step 3." in msg and "(None)" not in msg
    if how.endswith("loss"):
        assert f"produced a non-finite loss ({'nan' if how == 'nan loss' else 'inf'})" in msg
    else:
        assert "produced non-finite gradients for parameter(s) head." in msg and "(step not applied)" in msg
    # the step was never applied: with on_nonfinite="skip", step 3 leaves the weights where step 2 left them
    skipped = fit(pair, method=_Breaks(at=(3,), how=how), on_nonfinite="skip", **{**kw, "steps": 4})
    assert skipped.summary["skipped_steps"] == 1
    for (name, a), b in zip(before.model.state_dict().items(), skipped.model.state_dict().values()):
        assert torch.equal(a, b), name


class _TwoUpdates(Alignment):
    """Update "head" (NaN loss at the steps in ``head_at``), then update "encoder", run twice per step (NaN
    gradient at the steps in ``encoder_at``, both times)."""

    name = "two_updates"

    @dataclass
    class Options:
        head_at: tuple = ()
        encoder_at: tuple = ()

    def stages(self):
        m, o = self.model, self.options

        def head_loss(batch, t):
            l = self.source_loss(batch)[0]
            return (l * float("nan") if t.step in o.head_at else l), {}

        def encoder_loss(batch, t):
            l = self.source_loss(batch)[0]
            w = next(m.encoder.parameters())
            return (l + 0.0 * torch.sqrt((w - w.detach()).abs()).sum() if t.step in o.encoder_at else l), {}

        return [Stage("s", [Update("head", [m.head], head_loss), Update("encoder", [m.encoder], encoder_loss, repeat=2)])]


def test_skipped_steps_count_steps_and_skipped_updates_count_updates_and_both_survive_a_resume(tmp_path, monkeypatch):
    """Hand-counted: the head update is skipped at steps 1 and 4, the (twice repeated) encoder update at 4 and 6:
    steps 1, 4, 6 → 3 skipped steps; 1 + 1 + 2 + 2 → 6 skipped updates."""
    pair = moons_pair(n=40)
    method = lambda: _TwoUpdates(head_at=(1, 4), encoder_at=(4, 6))
    kw = dict(steps=8, batch_size=8, eval_every=4, on_nonfinite="skip", progress=False, device="cpu")
    whole = fit(pair, method=method(), run_dir=tmp_path / "whole", **kw).summary
    assert (whole["skipped_steps"], whole["skipped_updates"]) == (3, 6)
    assert whole["skipped_steps"] <= whole["steps"]

    orig = loop.Trainer._step

    def step(self):  # stop after step 4 (5 completed steps): steps 1 and 4 skipped so far, 1 + 1 + 2 updates
        if self.step == 4:
            os.kill(os.getpid(), signal.SIGTERM)
        orig(self)

    monkeypatch.setattr(loop.Trainer, "_step", step)
    with pytest.raises(Interrupted):
        fit(pair, method=method(), run_dir=tmp_path / "cut", **kw)
    monkeypatch.setattr(loop.Trainer, "_step", orig)
    ck = load_checkpoint(tmp_path / "cut" / "checkpoint.pt")
    assert (ck["step"], ck["skipped_steps"], ck["skipped_updates"]) == (5, 2, 4)
    resumed = fit(pair, method=method(), run_dir=tmp_path / "cut", **kw).summary
    assert (resumed["skipped_steps"], resumed["skipped_updates"]) == (3, 6)
