"""Runs that survive: a run stopped by a signal and resumed equals the uninterrupted run bit for bit (CPU).

Step numbers count *completed* steps: a checkpoint with ``step == k`` holds the state after k steps, which is the
state step k (0-based, ``Progress.step == k``) starts from. A signal arriving while step k runs stops the run after
that step, with ``step == k + 1`` on disk.

The subprocess tests drive the real hydra app (``adaptkit.cli:train_main``, what the ``adaptkit-train`` console
script calls) with real signals. Where a test needs the signal to land at an exact step, a small wrapper script
makes the process send SIGTERM to itself at that step; the loop cannot tell that from a scheduler's SIGTERM.
Exit status 75 is EX_TEMPFAIL ("temporary failure; the user is invited to retry", BSD sysexits.h).
"""
from __future__ import annotations

import json
import os
import random
import re
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import pytest
import torch

import adaptkit
from adaptkit import fit
from adaptkit.train import files, loop
from adaptkit.methods.base import Alignment, Stage, Update
from adaptkit.train.loop import DivergenceError, Interrupted, load_checkpoint

ROOT = Path(__file__).resolve().parents[2]
TRAIN_SCRIPT = Path(sys.executable).parent / "adaptkit-train"
RNG = random.Random(20240607)  # the interruption steps are random but fixed (parameters, drawn at collection)


@pytest.fixture
def rng(request):
    """A random source fixed per test, whatever else runs."""
    return random.Random(f"20240607-{request.node.name}")

# Test-side wrapper around the real CLI: TEST_SIGTERM_AT=k1,k2 makes the process SIGTERM itself while step k runs;
# TEST_HANG_MARKER additionally writes that file and then hangs in the step (a step that never ends, so that a
# second signal is the only way out); TEST_STEP_SECONDS slows every step so an outside signal lands mid-run.
WRAPPER = r'''
import os, signal, sys, time
at = {int(s) for s in os.environ.get("TEST_SIGTERM_AT", "").split(",") if s}
hang = os.environ.get("TEST_HANG_MARKER")
pace = float(os.environ.get("TEST_STEP_SECONDS", "0"))
if at or pace:
    from adaptkit.train import loop
    _step = loop.Trainer._step
    def step(self):
        if self.step in at:
            os.kill(os.getpid(), signal.SIGTERM)
            if hang:
                open(hang, "w").close()
                time.sleep(120)
        if pace:
            time.sleep(pace)
        _step(self)
    loop.Trainer._step = step
sys.argv[0] = "adaptkit-train"
from adaptkit.cli import train_main
train_main()
'''


def _registered(name: str):
    reason = f"method {name!r} is not registered (adaptkit.METHODS.names() = {adaptkit.METHODS.names()})"
    return pytest.param(name, id=name, marks=pytest.mark.skipif(name not in adaptkit.METHODS.names(), reason=reason))


def _env(**extra) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith("TEST_")}
    env.update(OMP_NUM_THREADS="1", MKL_NUM_THREADS="1", PYTHONHASHSEED="0", **extra)
    return env


def _overrides(method: str, steps: int, run_dir: Path, **more) -> list:
    o = {"method": method, "steps": steps, "eval_every": 5, "batch_size": 16, "seed": 3, "device": "cpu",
         "progress": "false", "data.n_source": 100, "data.n_target": 100, "run_dir": str(run_dir)}
    o.update(more)
    return [f"{k}={v}" for k, v in o.items()]


def _reference(overrides: list, run_dir: Path) -> Path:
    """The uninterrupted run, in this process, through the same config composition the CLI uses."""
    from adaptkit import train
    from adaptkit.config import compose

    cfg = compose([o for o in overrides if not o.startswith("run_dir=")] + [f"run_dir={run_dir}"])
    train(cfg)
    return run_dir


def _cli(tmp_path: Path, overrides: list, timeout: float = 120, **env) -> subprocess.CompletedProcess:
    wrapper = tmp_path / "wrapped_train.py"
    wrapper.write_text(WRAPPER)
    cmd = [sys.executable, str(wrapper)] if env else [str(TRAIN_SCRIPT)]
    return subprocess.run(cmd + overrides, cwd=tmp_path, env=_env(**env), capture_output=True, text=True,
                          timeout=timeout)


def _strip(obj):
    """Everything but wall-clock time (and the checkpoint's digests, which cover wall-clock values too: what they
    cover is compared directly)."""
    if isinstance(obj, dict):
        return {k: _strip(v) for k, v in obj.items() if k not in ("wall_seconds", "wall", "digests")}
    if isinstance(obj, (list, tuple)):
        return [_strip(v) for v in obj]
    return obj


def _assert_identical(a, b, path="checkpoint"):
    """Bit-for-bit equality of nested checkpoint contents (tensors by torch.equal, dtype included)."""
    if isinstance(a, torch.Tensor):
        assert isinstance(b, torch.Tensor) and a.dtype == b.dtype and torch.equal(a, b), f"{path} differs"
    elif isinstance(a, dict):
        assert isinstance(b, dict) and set(a) == set(b), f"{path}: keys {sorted(a)} != {sorted(b)}"
        for k in a:
            _assert_identical(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, (list, tuple)):
        assert isinstance(b, (list, tuple)) and len(a) == len(b), f"{path}: lengths differ"
        for i, (x, y) in enumerate(zip(a, b)):
            _assert_identical(x, y, f"{path}[{i}]")
    else:
        assert a == b, f"{path}: {a!r} != {b!r}"


def assert_same_run(got: Path, want: Path) -> None:
    """Final checkpoint (parameters, optimiser moments, batch positions, RNG states, history), summary and
    metrics file equal, wall-clock time aside."""
    _assert_identical(_strip(load_checkpoint(got / "checkpoint.pt")), _strip(load_checkpoint(want / "checkpoint.pt")))
    assert _strip(json.loads((got / "summary.json").read_text())) == \
        _strip(json.loads((want / "summary.json").read_text()))
    rows = lambda d: [_strip(json.loads(l)) for l in (d / "metrics.jsonl").read_text().splitlines()]
    assert rows(got) == rows(want)


def _no_temporaries(folder: Path) -> None:
    assert [p.name for p in folder.iterdir() if p.name.endswith(".tmp")] == []


# -- in-process -------------------------------------------------------------------------------------------------
def _sigterm_at(monkeypatch, steps) -> None:
    """Send this process a real SIGTERM while the loop runs each step in ``steps`` (0-based)."""
    orig = loop.Trainer._step

    def step(self):
        if self.step in steps:
            os.kill(os.getpid(), signal.SIGTERM)
        orig(self)

    monkeypatch.setattr(loop.Trainer, "_step", step)


# Stops inside a one-stage run, for ADDA inside each stage and on the stage boundary (after 20 of 40 steps the
# next step is the first of "adapt": on_stage_start must run on resume, and only then).
IN_PROCESS = [("source_only", [RNG.randrange(1, 39)]), ("dann", [RNG.randrange(1, 39)]),
              ("adda", [RNG.randrange(1, 19), RNG.randrange(21, 39)]), ("adda", [19])]


@pytest.mark.parametrize("method, stops", [pytest.param(m, s, id=f"{m}-stop-after-{'-'.join(str(k + 1) for k in s)}",
                                                        marks=_registered(m).marks) for m, s in IN_PROCESS])
def test_signalled_and_resumed_in_process_equals_uninterrupted(tmp_path, monkeypatch, method, stops):
    from tests.conftest import moons_pair

    pair = moons_pair(n=80)
    kw = dict(method=method, steps=40, batch_size=16, eval_every=7, seed=5, progress=False, device="cpu")
    fit(pair, run_dir=tmp_path / "ref", **kw)
    before = signal.getsignal(signal.SIGTERM)
    _sigterm_at(monkeypatch, set(stops))
    rd = tmp_path / "run"
    for k in stops:
        with pytest.raises(Interrupted, match=f"interrupted, resumable: stopped after {k + 1} of 40 steps"):
            fit(pair, run_dir=rd, **kw)
        assert load_checkpoint(rd / "checkpoint.pt")["step"] == k + 1
        assert not (rd / "summary.json").exists()
    run = fit(pair, run_dir=rd, **kw)
    assert run.summary["steps"] == 40
    assert_same_run(rd, tmp_path / "ref")
    assert signal.getsignal(signal.SIGTERM) is before  # the loop's handler is gone again


def test_resumed_from_an_intermediate_periodic_checkpoint_equals_uninterrupted(tmp_path, monkeypatch, rng):
    from tests.conftest import moons_pair

    pair = moons_pair(n=80)
    kw = dict(method="dann" if "dann" in adaptkit.METHODS.names() else "source_only", steps=24, batch_size=16,
              eval_every=5, seed=2, progress=False, device="cpu", checkpoint_every=3)
    orig, kept = files.write_torch, {}

    def keep_copies(path, obj):  # every periodic checkpoint, as it was written
        if Path(path).name == "checkpoint.pt":
            kept[obj["step"]] = orig(Path(path).with_name(f"at-{obj['step']}.pt"), obj)
        return orig(path, obj)

    monkeypatch.setattr(files, "write_torch", keep_copies)
    fit(pair, run_dir=tmp_path / "ref", **kw)
    monkeypatch.setattr(files, "write_torch", orig)
    assert sorted(kept) == [3, 6, 9, 12, 15, 18, 21, 24]
    k = rng.choice([9, 12, 15])  # a state between evaluations (every 5): running losses travel in the checkpoint
    rd = tmp_path / "from-intermediate"
    rd.mkdir()
    shutil.copy(kept[k], rd / "checkpoint.pt")
    fit(pair, run_dir=rd, **{**kw, "checkpoint_every": 0})  # checkpoint_every is run management, not config
    assert_same_run(rd, tmp_path / "ref")


# -- divergence guard -----------------------------------------------------------------------------------------------
class _BreaksAt(Alignment):
    """source_only until step ``k``; there the loss turns NaN (``how="loss"``), or stays finite while its gradient
    is NaN (``how="gradient"``: 0·√|w − w| has value 0 and derivative 0·∞ = NaN at 0), so the optimiser step
    writes NaN into the head's weight."""

    name = "breaks_at"

    @dataclass
    class Options:
        k: int = 0  # the 0-based step that breaks
        how: str = "loss"  # loss | gradient

    def stages(self):
        m, o = self.model, self.options

        def loss(batch, t):
            l, _ = self.source_loss(batch)  # (loss, logs)
            if t.step == o.k and o.how == "loss":
                return l * float("nan"), {}
            if t.step == o.k and o.how == "gradient":
                w = next(m.head.parameters())  # the head's (first) weight
                return l + 0.0 * torch.sqrt((w - w.detach()).abs()).sum(), {}
            return l, {}

        return [Stage("s", [Update("fragile", [m.encoder, m.head], loss)])]


@pytest.mark.parametrize("every", [1, 4])
def test_a_nan_loss_at_step_k_keeps_the_checkpoint_of_the_last_finite_step(tmp_path, monkeypatch, every, rng):
    """With checkpoint_every=1 the kept checkpoint is the state after k steps (step k-1's result, exactly the
    state the failing step k started from); in general the last periodic one, after ⌊k/every⌋·every steps."""
    from tests.conftest import moons_pair

    pair = moons_pair(n=60)
    k = rng.randrange(5, 15)
    kw = dict(steps=20, batch_size=8, eval_every=3, checkpoint_every=every, seed=4, progress=False, device="cpu")
    orig, healthy = files.write_torch, {}

    def keep_copies(path, obj):
        if Path(path).name == "checkpoint.pt":
            healthy[obj["step"]] = {n: t.clone() for n, t in obj["model"].items()}
        return orig(path, obj)

    monkeypatch.setattr(files, "write_torch", keep_copies)
    fit(pair, method=_BreaksAt(k=10**6), run_dir=tmp_path / "healthy", **kw)
    monkeypatch.setattr(files, "write_torch", orig)

    rd = tmp_path / "run"
    kept = (k // every) * every
    with pytest.raises(DivergenceError, match=re.escape(
            f"update 'fragile' in stage 's' produced a non-finite loss (nan) at step {k}.") + ".*" + re.escape(
            f"the last finite checkpoint (saved after {kept} completed steps) is kept in {rd / 'checkpoint.pt'}")):
        fit(pair, method=_BreaksAt(k=k), run_dir=rd, **kw)
    ck = load_checkpoint(rd / "checkpoint.pt")
    assert ck["step"] == kept
    _assert_identical(ck["model"], healthy[kept])
    assert not (rd / "summary.json").exists()
    _no_temporaries(rd)


@pytest.mark.parametrize("on_nonfinite", ["stop", "skip"])
def test_nan_gradients_are_caught_at_that_step_before_the_step_is_applied(tmp_path, on_nonfinite, rng):
    from tests.conftest import moons_pair

    k = rng.randrange(4, 10)
    kwargs = dict(method=_BreaksAt(k=k, how="gradient"), steps=20, batch_size=8, eval_every=50, checkpoint_every=3,
                  run_dir=tmp_path, on_nonfinite=on_nonfinite, progress=False, device="cpu")
    if on_nonfinite == "skip":
        run = fit(moons_pair(n=60), **kwargs)
        assert run.summary["skipped_steps"] == 1
        assert all(bool(p.isfinite().all()) for p in run.model.parameters())
        return
    with pytest.raises(DivergenceError, match=re.escape("update 'fragile' in stage 's' produced non-finite gradients "
                                                        "for parameter(s) head.") + r"\S*weight" + re.escape(
                                                        f" (step not applied) at step {k}.")):
        fit(moons_pair(n=60), **kwargs)
    ck = load_checkpoint(tmp_path / "checkpoint.pt")
    assert ck["step"] == (k // 3) * 3 and all(bool(t.isfinite().all()) for t in ck["model"].values()
                                               if t.is_floating_point())


# -- subprocesses: the real CLI and real signals -------------------------------------------------------------------
def _wait_for(predicate, proc: subprocess.Popen, timeout: float, what: str) -> None:
    end = time.monotonic() + timeout
    while not predicate():
        if proc.poll() is not None:
            out, err = proc.communicate()
            pytest.fail(f"the run ended (status {proc.returncode}) before {what}:\n{err[-3000:]}")
        if time.monotonic() > end:
            proc.kill()
            pytest.fail(f"timed out waiting for {what}")
        time.sleep(0.02)


def _metric_rows(run_dir: Path) -> int:
    try:
        return len((run_dir / "metrics.jsonl").read_text().splitlines())
    except FileNotFoundError:
        return 0


@pytest.mark.slow  # three processes, each importing torch
@pytest.mark.skipif(not TRAIN_SCRIPT.exists(), reason=f"console script {TRAIN_SCRIPT} is not installed")
def test_cli_outside_sigterm_then_second_signal_then_resume_equals_uninterrupted(tmp_path, rng):
    """source_only. (1) SIGTERM from outside at a random moment: exit 75 with 'interrupted, resumable'.
    (2) resumed, signalled inside a step that hangs, then signalled again: leaves at once, folder intact.
    (3) the plain console script resumes and finishes: identical to the uninterrupted run."""
    rd = tmp_path / "run"
    ov = _overrides("source_only", 160, rd, checkpoint_every=5)
    ref = _reference(ov, tmp_path / "ref")

    # (1) an outside SIGTERM once a seeded number of evaluations (every 5 steps) is on disk
    rows = rng.randrange(2, 8)
    wrapper = tmp_path / "wrapped_train.py"
    wrapper.write_text(WRAPPER)
    proc = subprocess.Popen([sys.executable, str(wrapper), *ov], cwd=tmp_path, text=True,
                            env=_env(TEST_STEP_SECONDS="0.01"), stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        _wait_for(lambda: _metric_rows(rd) >= rows, proc, 90, f"{rows} evaluations")
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 75, err[-3000:]
    assert "interrupted, resumable" in err
    first = load_checkpoint(rd / "checkpoint.pt")["step"]
    assert 5 * rows <= first < 160 and f"stopped after {first} of 160 steps" in err
    _no_temporaries(rd)

    # (2) the second signal: the first asks for a checkpoint at the end of the step, but the step hangs
    k = first + rng.randrange(3, 20)
    marker = tmp_path / "hanging"
    proc = subprocess.Popen([sys.executable, str(wrapper), *ov], cwd=tmp_path, text=True,
                            env=_env(TEST_SIGTERM_AT=str(k), TEST_HANG_MARKER=str(marker)),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        _wait_for(marker.exists, proc, 90, "the hanging step")
        t0 = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=30)
        took = time.monotonic() - t0
    finally:
        if proc.poll() is None:
            proc.kill()
    assert took < 10, f"the second signal took {took:.1f}s to stop the run"  # the step would hang for 120 s
    assert proc.returncode not in (0, 75), err[-3000:]
    assert "second signal" in err
    periodic = [c for c in range(first + 1, k + 1) if c % 5 == 0]
    assert load_checkpoint(rd / "checkpoint.pt")["step"] == max(periodic, default=first)
    assert not (rd / "summary.json").exists()
    _no_temporaries(rd)

    # (3) the unmodified console script picks up from there
    done = _cli(tmp_path, ov)
    assert done.returncode == 0, done.stderr[-3000:]
    assert_same_run(rd, ref)


@pytest.mark.slow  # two or three processes, each importing torch
@pytest.mark.skipif(not TRAIN_SCRIPT.exists(), reason=f"console script {TRAIN_SCRIPT} is not installed")
# The signal path of the console script is the same for every method; ADDA's two stages make it the most
# demanding case. DANN's one-stage state is resumed in process above (a CLI case for it, 32 s, was dropped for the
# suite's time: it added nothing the two tests do not check).
@pytest.mark.parametrize("method, steps, stops", [
    # ADDA's two stages split 40 steps 20/20: one stop inside "pretrain", one inside "adapt".
    pytest.param("adda", 40, [RNG.randrange(2, 18), RNG.randrange(21, 38)], id="adda-pretrain-then-adapt",
                 marks=_registered("adda").marks),
])
def test_cli_sigterm_at_a_seeded_step_exits_75_and_resumes_bit_identical(tmp_path, method, steps, stops):
    rd = tmp_path / "run"
    ov = _overrides(method, steps, rd)
    ref = _reference(ov, tmp_path / "ref")
    for k in stops:
        res = _cli(tmp_path, ov, TEST_SIGTERM_AT=str(k))
        assert res.returncode == 75, res.stderr[-3000:]
        assert f"interrupted, resumable: stopped after {k + 1} of {steps} steps" in res.stderr
        ck = load_checkpoint(rd / "checkpoint.pt")
        assert ck["step"] == k + 1
        _no_temporaries(rd)
    done = _cli(tmp_path, ov)
    assert done.returncode == 0, done.stderr[-3000:]
    assert_same_run(rd, ref)
