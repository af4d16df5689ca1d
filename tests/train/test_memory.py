"""The check before training that refuses runs whose largest tensors cannot fit: the estimates against what torch
builds (parameter counts by ``numel``; MMD's peak by the operating system's count of the process's peak resident
memory, ``VmHWM`` of ``/proc/self/status``, Linux proc(5)), and the refusals as one line with the
estimate and a way out, before any network is built.
"""
from __future__ import annotations

import re
import subprocess
import sys
import textwrap

import pytest
import torch

from adaptkit import fit
from adaptkit.methods import build_method
from adaptkit.nets import MLPEncoder
from adaptkit.train import memory
from tests.conftest import moons_pair

KW = dict(steps=2, batch_size=8, progress=False, device="cpu")


@pytest.mark.parametrize("input_shape, options", [((2,), {}), ((3, 4), {"hidden": [7, 5], "features": 3})])
def test_encoder_sizes_match_the_built_encoder(input_shape, options):
    n_params, per_sample = MLPEncoder.memory_sizes(input_shape, options)
    enc = MLPEncoder(input_shape, **options)
    assert n_params == sum(p.numel() for p in enc.parameters())  # torch's own count
    # the floats kept per sample: every Linear output and every ReLU output (torch's forward, counted by hooks)
    kept = []
    for m in enc.modules():
        if isinstance(m, (torch.nn.Linear, torch.nn.ReLU)):
            m.register_forward_hook(lambda mod, i, out: kept.append(out[0].numel()))
    enc(torch.zeros(1, *input_shape))
    assert per_sample == sum(kept)


@pytest.mark.slow  # a subprocess building about 1 GiB of kernel matrices
def test_the_mmd_estimate_is_close_to_the_measured_peak():
    b = 3000
    script = textwrap.dedent(f"""
        import torch
        from adaptkit.losses import mmd2
        # the peak resident size of this process's own memory (Linux's VmHWM, in kB): not ru_maxrss, which a child
        # inherits from its parent at fork, so a large pytest process would hide this process's own peak
        hwm = lambda: int(next(l for l in open("/proc/self/status") if l.startswith("VmHWM")).split()[1]) * 1024
        fs = torch.randn({b}, 32, requires_grad=True); ft = torch.randn({b}, 32, requires_grad=True)
        mmd2(fs[:4], ft[:4]).backward()  # allocator and kernels warmed up
        before = hwm()
        mmd2(fs, ft, "unbiased", n_kernels=5).backward()
        print(hwm() - before)
    """)
    res = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120,
                         env={"OMP_NUM_THREADS": "1", "PATH": "/usr/bin:/bin", **_pythonpath()})
    assert res.returncode == 0, res.stderr[-2000:]
    measured = int(res.stdout.split()[-1])
    (need,) = build_method("mmd", n_kernels=5).memory_needs(b)
    assert need.bytes == 9 * (2 * b) ** 2 * 4
    assert 0.7 * measured <= need.bytes <= 1.5 * measured, (need.bytes, measured)
    assert build_method("mmd", estimator="linear").memory_needs(b) == []


def _pythonpath() -> dict:
    import os

    return {"PYTHONPATH": os.environ["PYTHONPATH"]} if "PYTHONPATH" in os.environ else {}


def _free(monkeypatch, n_bytes: int) -> None:
    monkeypatch.setattr(memory, "available", lambda device: (n_bytes, "as the test says"))


def test_mmd_with_a_batch_too_large_is_refused_with_the_linear_estimator_as_the_way_out(monkeypatch):
    _free(monkeypatch, 2**30)
    b = 4000
    kernels = 9 * (2 * b) ** 2 * 4  # (n_kernels + 4) matrices of (2b)² float32 (Gretton et al. 2012, §2.2: all pairs)
    with pytest.raises(ValueError) as e:
        fit(moons_pair(n=60), method="mmd", **{**KW, "batch_size": b})
    text = str(e.value)
    assert "\n" not in text
    total = float(re.match(r"The run's largest tensors would need about ([\d.]+) GiB of memory on cpu", text).group(1))
    assert abs(total - kernels / 2**30) < 0.1  # the kernels dominate; the networks add a few MiB
    assert "more than the 1.0 GiB available (as the test says)" in text
    assert f"MMD's kernel matrices over 2 × 4000 batch features (9 of 8000 × 8000 floats): {memory.gib(kernels)}" in text
    assert "Try MMD's linear-time estimator (method.estimator=linear" in text
    fits = int(re.search(r"a batch_size of at most (\d+) fits", text).group(1))
    assert 9 * (2 * fits) ** 2 * 4 <= 2**30 < 9 * (2 * (fits + 1)) ** 2 * 4 + 16 * 2**20  # the kernels dominate
    fit(moons_pair(n=60), method="mmd", estimator="linear", **{**KW, "batch_size": b})  # linear: it runs


def test_encoder_widths_too_large_are_refused_before_any_allocation(monkeypatch):
    _free(monkeypatch, 8 * 2**30)
    built = []
    monkeypatch.setattr(MLPEncoder, "__init__", lambda self, *a, **k: built.append(a))
    with pytest.raises(ValueError, match=re.escape("the encoder's 10,003,600,032 weights × 3 (gradients, optimiser "
                                                   "state)")) as e:
        fit(moons_pair(n=60), encoder_options={"hidden": [100_000, 100_000]}, **KW)
    # (2+1)·1e5 + (1e5+1)·1e5 + (1e5+1)·32 weights and biases, 3 copies (SGD with momentum), 4 bytes each
    assert memory.gib(3 * 4 * ((2 + 1) * 10**5 + (10**5 + 1) * 10**5 + (10**5 + 1) * 32)) in str(e.value)
    assert "Try narrower or fewer encoder layers (encoder.hidden)." in str(e.value)
    assert built == []  # refused before the encoder was built


def test_runs_that_fit_are_not_refused_and_the_real_figure_is_read():
    free, source = memory.available(torch.device("cpu"))
    assert free is None or free > 0
    fit(moons_pair(n=60), method="mmd", **KW)


@pytest.mark.skipif(not torch.cuda.is_available(), reason="needs a CUDA device")
def test_gpu_free_memory_is_torchs_figure():
    free, source = memory.available(torch.device("cuda:0"))
    assert abs(free - torch.cuda.mem_get_info(0)[0]) < 64 * 2**20 and "mem_get_info" in source
