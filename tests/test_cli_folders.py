"""adaptkit-train's default run folder: a readable name and the run's short config hash, so runs with different
settings in one parent folder never collide; the name is deterministic, so re-running a ``-m`` sweep finds its
finished runs and trains nothing new."""
import json
import os
import subprocess
import sys
from pathlib import Path

import yaml

import adaptkit

CLI = [sys.executable, "-c", "from adaptkit.cli import train_main; train_main()"]
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "HYDRA_FULL_ERROR": "0",
       "PYTHONPATH": str(Path(__file__).resolve().parents[1] / "src")}
TINY = ["data=rotated_moons", "data.n_source=60", "data.n_target=60", "steps=10", "eval_every=5", "diagnostics=false"]


def _cli(args, cwd):
    out = subprocess.run(CLI + args, capture_output=True, text=True, env=ENV, cwd=cwd, timeout=300)
    assert out.returncode == 0, out.stderr[-3000:]
    return out.stdout


def _folders(cwd: Path):
    return sorted(p.parent for p in (cwd / "runs").rglob("summary.json"))


def test_two_runs_with_different_options_in_one_parent_folder_both_finish(tmp_path):
    _cli(TINY + ["method=coral", "method.weight=1.0"], tmp_path)
    _cli(TINY + ["method=coral", "method.weight=2.0"], tmp_path)  # was refused as "already finished" before
    folders = _folders(tmp_path)
    assert len(folders) == 2 and all(f.parent == tmp_path / "runs" / "rotated_moons" / "coral" for f in folders)
    summaries = [json.loads((f / "summary.json").read_text()) for f in folders]
    weights = sorted(yaml.safe_load((f / "config.yaml").read_text())["method"]["weight"] for f in folders)
    assert weights == [1.0, 2.0]
    for f, s in zip(folders, summaries):
        assert s["status"] == "finished"
        assert f.name == f"seed0-{s['config_hash'][:8]}"  # readable name, then the hash the run itself recorded
        assert s["versions"]["adaptkit"] == adaptkit.__version__  # a CLI summary records the versions too


def test_rerunning_a_sweep_reuses_its_finished_runs(tmp_path):
    sweep = ["-m"] + TINY + ["method=source_only,coral"]
    first = _cli(sweep, tmp_path)
    assert first.count("reused") == 0
    assert first.count("can silently make a model worse") == 1  # the warning once per sweep, not after every run
    folders = _folders(tmp_path)
    assert [f.parent.name for f in folders] == ["coral", "source_only"]
    kept = {f: {n: (f / n).read_bytes() for n in ("checkpoint.pt", "summary.json", "metrics.jsonl")} for f in folders}
    again = _cli(sweep, tmp_path)
    assert again.count("already finished: reused, nothing trained") == 2
    assert _folders(tmp_path) == folders  # no new folder (no timestamp in the name)
    for f, files in kept.items():  # nothing was trained or rewritten
        assert {n: (f / n).read_bytes() for n in files} == files
    # a single run with the same settings is the sweep's run: same folder, reused
    single = _cli(TINY + ["method=coral"], tmp_path)
    assert "reused, nothing trained" in single and _folders(tmp_path) == folders
