"""Sweeps through hydra's launchers: the shipped presets (``hydra/launcher=slurm``, ``ray_cluster``) compose on the
plugins' own schemas, and a real 2-run sweep through submitit's local executor and through a local Ray instance
trains each run in its own process, into the same run folder and to the same numbers as an in-process run, a
failing run failing alone, a rerun reusing what finished.

The launchers are optional extras (``adaptkit[slurm]``, ``adaptkit[ray]``): each test is skipped when its plugin is
not installed. The sweeps start fresh Python processes (and Ray a local instance): marked ``slow``."""
import importlib.util
import json
import os
import subprocess
import sys

import pytest

from adaptkit import fit
from adaptkit.config import CONFIG_DIR

CLI = [sys.executable, "-c", "from adaptkit.cli import train_main; train_main()"]
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "HYDRA_FULL_ERROR": "0"}
RUN = ["method=source_only", "steps=5", "eval_every=5", "data.n_source=60", "data.n_target=60", "batch_size=16",
       "diagnostics=false"]


def _installed(module):
    try:
        return importlib.util.find_spec(module) is not None
    except ModuleNotFoundError:
        return False


SUBMITIT = _installed("hydra_plugins.hydra_submitit_launcher")
RAY = _installed("hydra_plugins.hydra_ray_launcher") and _installed("ray")


def _hydra_launcher(overrides):
    from hydra import compose, initialize_config_dir
    from hydra.core.global_hydra import GlobalHydra

    from adaptkit.config import register_configs

    register_configs()
    GlobalHydra.instance().clear()
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("train", overrides=overrides, return_hydra_config=True).hydra.launcher


@pytest.mark.skipif(not SUBMITIT, reason="hydra-submitit-launcher is not installed (pip install 'adaptkit[slurm]')")
def test_the_slurm_preset_composes_on_the_submitit_schema():
    launcher = _hydra_launcher(["hydra/launcher=slurm", "hydra.launcher.partition=gpu"])
    # the plugin's own class and fields (hydra_plugins/hydra_submitit_launcher/config.py), our sizes on top
    assert launcher._target_ == "hydra_plugins.hydra_submitit_launcher.submitit_launcher.SlurmLauncher"
    assert (launcher.timeout_min, launcher.cpus_per_task, launcher.partition) == (120, 4, "gpu")
    with pytest.raises(Exception, match="timeout_mni"):  # the plugin's schema refuses an unknown field
        _hydra_launcher(["hydra/launcher=slurm", "hydra.launcher.timeout_mni=3"])


@pytest.mark.skipif(not RAY, reason="hydra-ray-launcher and ray are not installed (pip install 'adaptkit[ray]')")
def test_the_ray_cluster_preset_composes_on_the_ray_schema():
    launcher = _hydra_launcher(["hydra/launcher=ray_cluster"])
    assert launcher._target_ == "hydra_plugins.hydra_ray_launcher.ray_launcher.RayLauncher"
    assert launcher.ray.init.address == "auto" and launcher.ray.remote.num_cpus == 1


RUN_FILES = ("summary.json", "checkpoint.pt", "metrics.jsonl", "config.yaml")  # what training writes


def _sweep(tmp_path, launcher, extra):
    out = subprocess.run(CLI + ["-m", *launcher, *RUN, "optim.lr=0.05,1e30", f"hydra.sweep.dir={tmp_path / 'sw'}",
                                *extra], capture_output=True, text=True, env=ENV, timeout=480, cwd=tmp_path)
    return out


def _check_sweep(tmp_path, out, launcher):
    # the run with lr=1e30 diverges in its own job: the sweep reports it, the other run is finished all the same
    assert out.returncode != 0, out.stdout + out.stderr
    runs = list((tmp_path / "sw" / "rotated_moons" / "source_only").iterdir())
    assert len(runs) == 2, runs
    done = [r for r in runs if (r / "summary.json").exists()]
    assert len(done) == 1, out.stderr
    summary = json.loads((done[0] / "summary.json").read_text())
    last = json.loads((done[0] / "metrics.jsonl").read_text().splitlines()[-1])
    # the same run in this process, without any launcher: the launched job computed exactly this
    ref = fit({"name": "rotated_moons", "n_source": 60, "n_target": 60}, method="source_only", steps=5, eval_every=5,
              batch_size=16, progress=False, device="cpu", optim={"lr": 0.05})
    assert summary["config_hash"] == ref.summary["config_hash"]
    assert summary["target_accuracy"] == ref.summary["target_accuracy"]
    losses = [k for k in ref.history[-1] if k.startswith("loss/")]
    assert losses and all(last[k] == ref.history[-1][k] for k in losses)
    # resumable: the same run swept again is reused from its folder (named by its config hash), nothing trained
    written = {p: p.stat().st_mtime_ns for p in (done[0] / n for n in RUN_FILES)}  # hydra's .hydra/ is rewritten
    again = subprocess.run(CLI + ["-m", *launcher, *RUN, "optim.lr=0.05", f"hydra.sweep.dir={tmp_path / 'sw'}"],
                           capture_output=True, text=True, env=ENV, timeout=480, cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    assert {p: p.stat().st_mtime_ns for p in written} == written
    logs = again.stdout + again.stderr + "".join(p.read_text(errors="replace") for p in (tmp_path / "sw").rglob("*.out"))
    assert "already finished: reused, nothing trained" in logs  # a job's stdout: submitit's log file, Ray's driver


@pytest.mark.slow
@pytest.mark.skipif(not SUBMITIT, reason="hydra-submitit-launcher is not installed (pip install 'adaptkit[slurm]')")
def test_a_sweep_through_submitit_local_runs_each_run_as_its_own_job(tmp_path):
    launcher = ["hydra/launcher=submitit_local", "hydra.launcher.timeout_min=5"]
    _check_sweep(tmp_path, _sweep(tmp_path, launcher, []), launcher)
    assert list((tmp_path / "sw" / ".submitit").iterdir())  # submitit's own job folders: it ran the jobs


@pytest.mark.slow
@pytest.mark.skipif(not RAY, reason="hydra-ray-launcher and ray are not installed (pip install 'adaptkit[ray]')")
def test_a_sweep_through_a_local_ray_instance_runs_each_run_as_a_ray_task(tmp_path):
    launcher = ["hydra/launcher=ray", "+hydra.launcher.ray.init.num_cpus=2",
                "+hydra.launcher.ray.init.include_dashboard=false"]
    out = _sweep(tmp_path, launcher, [])
    assert "Started a local Ray instance" in out.stderr + out.stdout
    _check_sweep(tmp_path, out, launcher)
