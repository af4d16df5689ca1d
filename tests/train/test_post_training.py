"""The post-training phase is part of the run: after the last training step a run estimates the label shift,
measures its diagnostics and draws its plots, each step recorded in ``summary["post_training"]`` as it completes.
A SIGTERM/SIGINT there exits "interrupted, resumable" (status 75 from the CLI) as during training, and a rerun
completes the steps still owed without training: no training step runs (counted by wrapping ``Trainer._step``),
``metrics.jsonl`` and ``checkpoint.pt`` keep their bytes, and the folder ends equal to an uninterrupted run's.

The reference for every "equal" below is an uninterrupted run of the same settings in another folder; the bytes
are compared with plain file reads, the summaries with ``json``.
"""
from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from adaptkit import fit
from adaptkit.measure import runs as measure_runs
from adaptkit.train import loop
from adaptkit.train.loop import Interrupted
from tests.conftest import moons_pair
from tests.train.test_resume import TRAIN_SCRIPT, _env, _overrides, _strip, assert_same_run

KW = dict(method="source_only", steps=12, batch_size=8, eval_every=4, seed=2, progress=False, device="cpu")
PLOTS = ["plots/features.png", "plots/learning_curves.png"]


def _bytes(rd: Path) -> dict:
    return {name: (rd / name).read_bytes() for name in ("metrics.jsonl", "checkpoint.pt", "config.yaml")}


def _count_steps(monkeypatch) -> list:
    """Every training step run in this process from now on, by its number."""
    ran, orig = [], loop.Trainer._step

    def step(self):
        ran.append(self.step)
        orig(self)

    monkeypatch.setattr(loop.Trainer, "_step", step)
    return ran


def _signal_inside(monkeypatch, name: str, signum=signal.SIGTERM) -> None:
    """A real ``signum`` to this process while ``adaptkit.measure.runs.<name>`` runs (it then never returns on its
    own: only the signal ends it)."""
    orig = getattr(measure_runs, name)

    def slow(*args, **kwargs):
        os.kill(os.getpid(), signum)
        time.sleep(30)  # the handler raises during the sleep
        return orig(*args, **kwargs)

    monkeypatch.setattr(measure_runs, name, slow)


@pytest.fixture(scope="module")
def reference(tmp_path_factory) -> Path:
    rd = tmp_path_factory.mktemp("ref") / "run"
    fit(moons_pair(n=60), run_dir=rd, **KW)
    return rd


def test_a_finished_run_records_each_post_training_step(reference):
    summary = json.loads((reference / "summary.json").read_text())
    assert summary["status"] == "finished"
    assert summary["post_training"] == {"label_shift": "done", "diagnostics": "done", "plots": "done"}
    assert all((reference / f).is_file() for f in ["diagnostics.json", *PLOTS])
    # a run without a folder has nowhere to draw: the plots are off, the diagnostics off unless asked
    run = fit(moons_pair(n=60), **KW)
    assert run.summary["post_training"] == {"label_shift": "done", "diagnostics": "off", "plots": "off"}
    run = fit(moons_pair(n=60), diagnostics=True, **KW)
    assert run.summary["post_training"] == {"label_shift": "done", "diagnostics": "done", "plots": "off"}


@pytest.mark.parametrize("where, signum, owed", [
    ("diagnose", signal.SIGTERM, ["diagnostics", "plots"]),
    ("draw_plots", signal.SIGINT, ["plots"]),
], ids=["sigterm-in-diagnostics", "sigint-in-plots"])
def test_a_signal_in_the_post_training_phase_is_resumable_and_the_rerun_trains_nothing(
        tmp_path, monkeypatch, reference, where, signum, owed):
    rd = tmp_path / "run"
    _signal_inside(monkeypatch, where, signum)
    with pytest.raises(Interrupted, match=r"interrupted, resumable: training finished \(12 steps\); stopped "
                                          rf"\({signal.Signals(signum).name}\) in the post-training phase before "
                                          rf"{re.escape(', '.join(owed))} (was|were) done; rerun"):
        fit(moons_pair(n=60), run_dir=rd, **KW)
    monkeypatch.undo()
    summary = json.loads((rd / "summary.json").read_text())
    assert summary["status"] == "finished"  # training is over, and the summary says which steps are owed
    assert [s for s, state in summary["post_training"].items() if state == "pending"] == sorted(owed)
    assert not any((rd / f).exists() for f in PLOTS)
    before = _bytes(rd)

    ran = _count_steps(monkeypatch)
    run = fit(moons_pair(n=60), run_dir=rd, **KW)
    assert ran == []  # not one training step
    assert _bytes(rd) == before  # metrics, checkpoint and config untouched
    assert run.summary["post_training"] == {"label_shift": "done", "diagnostics": "done", "plots": "done"}
    assert_same_run(rd, reference)
    assert json.loads((rd / "diagnostics.json").read_text()) == json.loads((reference / "diagnostics.json").read_text())
    assert all((rd / f).stat().st_size > 0 for f in PLOTS)
    # now complete: the rules for a finished run hold again (refused without overwrite)
    with pytest.raises(ValueError, match="already holds a finished run"):
        fit(moons_pair(n=60), run_dir=rd, **KW)


def test_a_signal_in_the_last_training_step_stops_before_the_phase(tmp_path, monkeypatch, reference):
    rd = tmp_path / "run"
    orig = loop.Trainer._step

    def step(self):
        if self.step == KW["steps"] - 1:
            os.kill(os.getpid(), signal.SIGTERM)  # the loop finishes the last step, then the run stops
        orig(self)

    monkeypatch.setattr(loop.Trainer, "_step", step)
    with pytest.raises(Interrupted, match="before label-shift, diagnostics, plots were done"):
        fit(moons_pair(n=60), run_dir=rd, **KW)
    monkeypatch.undo()
    assert set(json.loads((rd / "summary.json").read_text())["post_training"].values()) == {"pending"}
    ran = _count_steps(monkeypatch)
    fit(moons_pair(n=60), run_dir=rd, **KW)
    assert ran == []
    assert_same_run(rd, reference)


def test_deleted_plots_and_leftover_temporaries_are_completed_without_training(tmp_path, monkeypatch, reference):
    rd = tmp_path / "run"
    fit(moons_pair(n=60), run_dir=rd, **KW)
    (rd / PLOTS[1]).unlink()  # recorded done, but the file is gone
    leftover = rd / "plots" / ".features.png.a1b2c3d4.tmp"  # what a kill between write and rename leaves
    leftover.write_bytes(b"partial")
    ran = _count_steps(monkeypatch)
    fit(moons_pair(n=60), run_dir=rd, **KW)
    assert ran == [] and (rd / PLOTS[1]).is_file() and not leftover.exists()
    assert_same_run(rd, reference)


def test_changed_settings_are_refused_before_completing(tmp_path, monkeypatch):
    rd = tmp_path / "run"
    _signal_inside(monkeypatch, "diagnose")
    with pytest.raises(Interrupted):
        fit(moons_pair(n=60), run_dir=rd, **KW)
    monkeypatch.undo()
    with pytest.raises(ValueError, match="config hash"):
        fit(moons_pair(n=60), run_dir=rd, **{**KW, "batch_size": 16})
    (rd / "checkpoint.pt").unlink()
    with pytest.raises(ValueError, match=r"post-training steps \(diagnostics, plots\) are unfinished, but its "
                                         r"checkpoint.pt is missing"):
        fit(moons_pair(n=60), run_dir=rd, **KW)


# -- the console script, killed from outside --------------------------------------------------------------------
# The child patches the diagnostics to mark that they started and then take long; the parent signals it there.
SLOW_DIAGNOSTICS = r'''
import os, sys, time
from adaptkit.measure import runs
marker = os.environ["TEST_DIAGNOSTICS_MARKER"]
orig = runs.diagnose
def diagnose(*args, **kwargs):
    open(marker, "w").close()
    time.sleep(120)
    return orig(*args, **kwargs)
runs.diagnose = diagnose
sys.argv[0] = "adaptkit-train"
from adaptkit.cli import train_main
train_main()
'''


def _wait_for(cond, proc, timeout: float, what: str) -> None:
    t0 = time.monotonic()
    while not cond():
        if proc.poll() is not None:
            raise AssertionError(f"the process ended before {what}: {proc.stderr.read()[-3000:]}")
        if time.monotonic() - t0 > timeout:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.05)


@pytest.mark.slow  # subprocesses importing torch
@pytest.mark.skipif(not TRAIN_SCRIPT.exists(), reason=f"console script {TRAIN_SCRIPT} is not installed")
@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGINT], ids=["sigterm", "sigint"])
def test_cli_killed_in_the_diagnostics_exits_75_and_a_rerun_completes_them_without_training(tmp_path, signum):
    from adaptkit import train
    from adaptkit.config import compose

    rd, ref = tmp_path / "run", tmp_path / "ref"
    ov = _overrides("source_only", 20, rd)
    train(compose([o for o in ov if not o.startswith("run_dir=")] + [f"run_dir={ref}"]))
    script, marker = tmp_path / "slow_diagnostics.py", tmp_path / "diagnosing"
    script.write_text(SLOW_DIAGNOSTICS)
    proc = subprocess.Popen([sys.executable, str(script), *ov], cwd=tmp_path, text=True,
                            env=_env(TEST_DIAGNOSTICS_MARKER=str(marker)), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE)
    try:
        _wait_for(marker.exists, proc, 120, "the diagnostics")
        proc.send_signal(signum)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 75, err[-3000:]  # EX_TEMPFAIL, as for a stop during training (was 143 / 130)
    assert "adaptkit-train: interrupted, resumable: training finished (20 steps)" in err
    assert "before diagnostics, plots were done" in err and str(rd) in err
    summary = json.loads((rd / "summary.json").read_text())
    assert summary["post_training"] == {"label_shift": "done", "diagnostics": "pending", "plots": "pending"}
    if signum == signal.SIGINT:
        return  # the folder is in the same state as after SIGTERM: the rerun below does not depend on the signal
    before = _bytes(rd)

    done = subprocess.run([str(TRAIN_SCRIPT), *ov], cwd=tmp_path, env=_env(), capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 0, done.stderr[-3000:]
    assert "training had finished: completed diagnostics, plots, nothing trained" in done.stdout
    assert _bytes(rd) == before  # no training step wrote metrics or a checkpoint
    assert_same_run(rd, ref)
    assert all((rd / f).is_file() for f in ["diagnostics.json", *PLOTS])
    assert not [p for p in rd.rglob("*.tmp")]
    # complete now: an explicit run_dir keeps refusing a finished run (status 2, one line)
    again = subprocess.run([str(TRAIN_SCRIPT), *ov], cwd=tmp_path, env=_env(), capture_output=True, text=True,
                           timeout=120)
    assert again.returncode == 2 and "already holds a finished run" in again.stderr
    assert _strip(json.loads((rd / "summary.json").read_text())) == _strip(summary | {
        "post_training": {"label_shift": "done", "diagnostics": "done", "plots": "done"},
        "diagnostics": json.loads((rd / "diagnostics.json").read_text())})
