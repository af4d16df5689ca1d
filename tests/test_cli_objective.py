"""A hydra sweeper searches run options by a label-free score: `adaptkit-train objective=<score>` returns it."""
import json
import os
import subprocess
import sys

import pytest
import yaml

from adaptkit.cli import objective_value
from adaptkit.config import RunConfig, check, resolve

CLI = [sys.executable, "-c", "from adaptkit.cli import train_main; train_main()"]
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "HYDRA_FULL_ERROR": "0"}


def test_the_objective_is_recorded_and_checked():
    c = resolve(RunConfig(method="coral", objective="score/info_max"))
    assert c.objective == "info_max" and "info_max" in c.scores  # recorded at every evaluation
    with pytest.raises(ValueError, match=r"'objective' parameter .* must be one of .*'info_max'.*Got 'accuracy'"):
        check(RunConfig(objective="accuracy"))


def test_the_objective_is_oriented_greater_is_better_at_the_selected_step():
    class R:
        history = [{"step": 5, "score/dev": 0.2}, {"step": 10, "score/dev": 0.3}]
        summary = {"selected_step": 5}
    assert objective_value(R(), "dev") == -0.2  # DEV is a risk: lower is better, so negated; the kept step's value
    R.history = [{"step": 5, "score/info_max": 0.2}, {"step": 10, "score/info_max": 0.3}]
    R.summary = {}
    assert objective_value(R(), "info_max") == 0.3  # no selection: the last evaluation
    R.history = [{"step": 5}]
    with pytest.raises(ValueError, match="recorded no value"):
        objective_value(R(), "info_max")


def test_an_optuna_sweep_maximises_the_label_free_objective(tmp_path):
    pytest.importorskip("hydra_plugins.hydra_optuna_sweeper")
    out = subprocess.run(CLI + ["-m", "hydra/sweeper=optuna", "hydra.sweeper.n_trials=2", "hydra.sweeper.n_jobs=1",
                                "hydra.sweeper.direction=maximize", "method=coral", "method.weight=interval(0.05,1.0)",
                                "objective=info_max", "steps=20", "progress=false", "diagnostics=false",
                                f"hydra.sweep.dir={tmp_path}", "hydra.sweep.subdir=trial${hydra.job.num}"],
                         capture_output=True, text=True, env=ENV, timeout=240)
    assert out.returncode == 0, out.stderr[-2000:]
    best = yaml.safe_load((tmp_path / "optimization_results.yaml").read_text())
    # what each trial recorded (metrics.jsonl, last evaluation); info_max is higher-is-better, so returned as is
    values = []
    for trial in ("trial0", "trial1"):
        rows = [json.loads(line) for line in (tmp_path / trial / "metrics.jsonl").read_text().splitlines()]
        values.append([r["score/info_max"] for r in rows if "score/info_max" in r][-1])
    assert best["best_value"] == pytest.approx(max(values))
    assert 0.05 <= best["best_params"]["method.weight"] <= 1.0
