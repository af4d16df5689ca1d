"""The examples run (with few steps), so the README's and examples' promises stay true."""
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "EXAMPLE_STEPS": "40"}


@pytest.mark.parametrize("script", ["own_encoder.py", "arrays.py", "search_without_target_labels.py"])
def test_example_script_runs(script):
    out = subprocess.run([sys.executable, str(ROOT / "examples" / script)], capture_output=True, text=True, env=ENV,
                         cwd=ROOT, timeout=300)
    assert out.returncode == 0, out.stderr[-2000:]
    assert "can silently make a model worse" in out.stdout


def test_an_alignment_class_runs_from_the_cli_by_import_path(tmp_path):
    args = [sys.executable, "-c", "from adaptkit.cli import train_main; train_main()", "method=source_only",
            "method.name=examples.entropy_alignment.MeanMatchEntropy", "+method.weight=1.0",
            "+method.entropy_weight=0.1", "steps=20", "eval_every=10", "diagnostics=false",
            f"run_dir={tmp_path / 'run'}", f"hydra.run.dir={tmp_path / 'h'}"]
    out = subprocess.run(args, capture_output=True, text=True, env=ENV, cwd=ROOT, timeout=300)
    assert out.returncode == 0, out.stderr[-2000:]
    assert "mean_match_entropy on rotated_moons seed 0" in out.stdout


def test_a_plain_loss_function_trains_through_fit():
    sys.path.insert(0, str(ROOT))
    from examples.my_alignment import energy_distance

    import adaptkit

    run = adaptkit.fit("rotated_moons", method=energy_distance, weight=0.5, steps=20, progress=False, device="cpu")
    assert run.summary["method"] == "energy_distance" and run.method.describe()["loss_fn"].endswith("energy_distance")
