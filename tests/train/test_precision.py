"""The ``precision`` run setting: it composes, bf16 is refused off CUDA in one line, the losses that need float32
keep it under autocast, the loop runs its updates' forward passes inside the autocast context, and (CUDA only) a
bf16 run trains."""
import os
import re
import subprocess
import sys

import numpy as np
import pytest
import torch

from adaptkit import fit
from adaptkit.config import RunConfig, check, compose, config_hash, from_composed, resolve
from adaptkit.losses import coral_distance, mmd2
from adaptkit.train import loop as loop_module
from adaptkit.train.precision import float32_loss
from tests.conftest import moons_pair

CPU_REFUSAL = ("The 'precision' parameter of the run settings is 'bf16', which needs a CUDA device; this run's device "
               "is 'cpu'. Use precision=float32 there (the default).")
CUDA = torch.cuda.is_available()


def test_the_precision_setting_composes_and_changes_the_config_hash():
    cfg = from_composed(compose(["precision=bf16", "device=cuda"]))
    assert cfg.precision == "bf16" and cfg.device == "cuda"
    assert RunConfig().precision == "float32"
    # bf16 changes a run's numbers, so it is part of the hash (unlike device, a MANAGEMENT setting)
    assert config_hash(resolve(RunConfig(precision="bf16"))) != config_hash(resolve(RunConfig()))
    with pytest.raises(ValueError, match=re.escape("The 'precision' parameter of the run settings must be one of "
                                                   "{'float32', 'bf16'}. Got 'fp16' instead.")):
        check(RunConfig(precision="fp16"))


def test_bf16_is_refused_on_the_cpu_in_one_line():
    with pytest.raises(ValueError, match=re.escape(CPU_REFUSAL)):
        check(RunConfig(precision="bf16", device="cpu"))  # an explicit CPU: refused when the config is checked
    with pytest.raises(ValueError, match=re.escape(CPU_REFUSAL)):
        fit(moons_pair(n=40), precision="bf16", device="cpu", steps=2, batch_size=8, progress=False)
    if not CUDA:  # device=auto on a machine without CUDA: refused where the run's device is known
        check(RunConfig(precision="bf16"))  # a sweep may be composed on a machine without the GPUs
        with pytest.raises(ValueError, match=re.escape(CPU_REFUSAL)):
            fit(moons_pair(n=40), precision="bf16", steps=2, batch_size=8, progress=False)


def test_the_cli_refuses_bf16_on_the_cpu_with_status_2(tmp_path):
    cli = [sys.executable, "-c", "from adaptkit.cli import train_main; train_main()"]
    out = subprocess.run(cli + ["precision=bf16", "device=cpu", "steps=2", f"hydra.run.dir={tmp_path}"],
                         capture_output=True, text=True, timeout=120,
                         env={**os.environ, "OMP_NUM_THREADS": "1", "HYDRA_FULL_ERROR": "0"})
    assert out.returncode == 2, out.stderr
    assert CPU_REFUSAL in out.stderr and len(out.stderr.strip().splitlines()) == 1
    assert not any(tmp_path.iterdir())  # refused before hydra made a folder


def _features(seed):
    g = torch.Generator().manual_seed(seed)
    # offset features: ‖a‖² and a·b are large and close, the case where bf16's 8-bit mantissa loses the distance
    return torch.randn(32, 8, generator=g) + 20.0, torch.randn(32, 8, generator=g) * 1.5 + 20.3


def _mmd_numpy(x, y, gammas):
    """Unbiased MK-MMD² in float64 by its definition (Gretton et al., JMLR 2012, §2.2), straight from numpy."""
    def k(a, b):
        d = ((a[:, None, :] - b[None, :, :]) ** 2).sum(-1)
        return np.mean([np.exp(-d / g) for g in gammas], axis=0)
    m, n = len(x), len(y)
    kxx, kyy, kxy = k(x, x), k(y, y), k(x, y)
    return ((kxx.sum() - np.trace(kxx)) / (m * (m - 1)) + (kyy.sum() - np.trace(kyy)) / (n * (n - 1))
            - 2 * kxy.mean())


def test_mmd_and_coral_stay_float32_under_bf16_autocast():
    fs, ft = _features(0)
    x, y = fs.double().numpy(), ft.double().numpy()
    gammas = [4.0, 8.0, 16.0]
    coral_ref = ((np.cov(x, rowvar=False) - np.cov(y, rowvar=False)) ** 2).sum() / (4 * 8 ** 2)  # Sun & Saenko 2016
    # CPU autocast has the same bf16 matmul policy as CUDA's (torch.amp docs): a plain product is bf16 inside it
    with torch.autocast("cpu", dtype=torch.bfloat16):
        assert (fs @ ft.T).dtype == torch.bfloat16  # autocast is active: undecorated arithmetic would be bf16
        m = mmd2(fs, ft, "unbiased", bandwidths=gammas)
        c = coral_distance(fs, ft)
        m_bf16 = mmd2.__wrapped__(fs, ft, "unbiased", bandwidths=gammas)  # the same function without the guard
    assert m.dtype == torch.float32 and c.dtype == torch.float32
    assert float(m) == pytest.approx(_mmd_numpy(x, y, gammas), rel=1e-3, abs=1e-5)
    assert float(c) == pytest.approx(coral_ref, rel=1e-3)
    # and the guard matters: in bf16 the kernel's ‖a‖² + ‖b‖² − 2a·b loses the distances entirely here
    assert abs(float(m_bf16) - _mmd_numpy(x, y, gammas)) > 10 * abs(float(m) - _mmd_numpy(x, y, gammas))


def test_float32_loss_changes_nothing_without_autocast():
    fs, ft = _features(1)
    assert torch.equal(mmd2(fs, ft, bandwidths=[4.0]), mmd2.__wrapped__(fs, ft, bandwidths=[4.0]))
    twice = float32_loss(lambda a: a * 2)
    half = torch.ones(3, dtype=torch.float16)
    assert twice(half).dtype == torch.float16  # outside autocast, inputs are left as they are


def test_the_loop_runs_each_update_forward_inside_the_autocast_context(monkeypatch):
    """The wiring, on the CPU: the loop's one autocast spot is patched to CPU bf16 autocast (the real setting
    refuses the CPU); the encoder's output is then bf16 in training while MMD's distance stays float32."""
    seen = {"features": set(), "align": set()}
    monkeypatch.setattr(loop_module, "autocast_for",
                        lambda precision, device: torch.autocast("cpu", dtype=torch.bfloat16))

    import adaptkit.methods.mmd as mmd_module

    original = mmd_module.mmd2

    def probe(fs, ft, *a, **k):
        out = original(fs, ft, *a, **k)
        seen["features"].add(fs.dtype)
        seen["align"].add(out.dtype)
        return out

    monkeypatch.setattr(mmd_module, "mmd2", probe)
    run = fit(moons_pair(n=60), method="mmd", steps=3, batch_size=16, progress=False, device="cpu", eval_every=3)
    assert seen["features"] == {torch.bfloat16} and seen["align"] == {torch.float32}
    assert np.isfinite(run.history[-1]["loss/classify_align"])


@pytest.mark.skipif(not CUDA, reason="needs a CUDA device")
@pytest.mark.parametrize("method", ["coral", "mmd", "dann"])
def test_a_bf16_step_on_the_gpu_runs_close_to_float32(method):
    pair = moons_pair(n=200)
    common = dict(method=method, steps=5, batch_size=32, progress=False, device="cuda", eval_every=5, seed=0)
    a = fit(pair, precision="float32", **common)
    b = fit(pair, precision="bf16", **common)
    key = next(k for k in a.history[-1] if k.startswith("loss/"))
    # bf16 keeps about 3 significant digits (8-bit mantissa): after 5 steps the mean loss agrees to a few percent
    assert b.history[-1][key] == pytest.approx(a.history[-1][key], rel=0.05)
    assert all(p.dtype == torch.float32 for p in b.model.parameters())  # parameters stay float32


@pytest.mark.skipif(CUDA, reason="checks the behaviour without a CUDA device")
def test_the_gpu_benchmark_skips_in_one_line_without_cuda():
    script = os.path.join(os.path.dirname(__file__), "..", "..", "benchmarks", "gpu_step_time.py")
    out = subprocess.run([sys.executable, script], capture_output=True, text=True, timeout=120,
                         env={**os.environ, "OMP_NUM_THREADS": "1"})
    assert out.returncode == 0 and out.stdout == "no CUDA device: skipped\n", out.stderr
