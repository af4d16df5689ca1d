"""Running a grid: resume after an interruption, refusal of stale cell folders, fault isolation, the results and
report of a tiny grid, and a user's loss joining the grid through one override. Grids here are 2-3 methods × 1-2
small shifts × 2 seeds with 20 steps, so the whole file runs in well under a minute on two cores."""
import csv
import json
import re
from pathlib import Path

import pytest
import torch

from adaptkit.bench.cell import CELL_SPEC, FAILURE
from adaptkit.bench.config import compose_bench
from adaptkit.bench.grid import execute, run_grid
from adaptkit.bench.plan import plan_grid
from adaptkit.bench.report import read_results_csv
from adaptkit.safety import REPORT_NOTE

from .helpers import NET, numbers, tiny

ROOT = Path(__file__).resolve().parents[2]


# -- a finished tiny grid, shared by the report and resume tests -------------------------------------------------
@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """The tiny grid run without interruption, with two worker processes, recording one selection score."""
    out = tmp_path_factory.mktemp("grid")
    return run_grid(**tiny(out, workers=2, scores=["target_entropy"]))


def test_resume_after_an_interruption_gives_the_uninterrupted_results(tmp_path, finished):
    settings = tiny(tmp_path, scores=["target_entropy"])
    first = run_grid(**settings, max_cells=3)
    assert (first.ran, first.pending, first.complete) == (3, 5, False)
    assert len(read_results_csv(tmp_path / "results.csv")) == 3  # what is done so far

    second = run_grid(**settings)
    assert (second.ran, second.reused, second.pending) == (5, 3, 0)
    resumed, whole = read_results_csv(tmp_path / "results.csv"), read_results_csv(finished.results_csv)
    assert len(resumed) == 8 and all(r["status"] == "ok" for r in resumed)
    assert numbers(resumed) == numbers(whole)  # one worker in-process == two worker processes, to the bit
    assert all(r["score/target_entropy"] is not None for r in resumed)

    third = run_grid(**settings)  # nothing left: every cell reused, results rebuilt identically
    assert (third.ran, third.reused) == (0, 8)
    assert numbers(read_results_csv(tmp_path / "results.csv")) == numbers(resumed)


def test_a_finished_grid_with_other_settings_is_refused(tmp_path, finished):
    with pytest.raises(ValueError, match=re.escape("were written with other settings than this grid's")):
        run_grid(**tiny(finished.out_dir, scores=["target_entropy"], recipes={"rotated_moons": {**NET, "steps": 30},
                                                                              "shifted_blobs": NET}))


def test_a_failing_cell_is_recorded_and_the_grid_goes_on(tmp_path):
    methods = ["source_only", "tests.bench.helpers.FailsOnTwoInputs", "tests.bench.helpers.nan_loss"]
    result = run_grid(**tiny(tmp_path, methods=methods))
    status = {(r["method"], r["shift"], r["seed"]): r for r in result.rows}
    assert len(status) == 12
    for seed in (0, 1):
        assert status[("source_only", "rotated_moons", seed)]["status"] == "ok"
        assert status[("FailsOnTwoInputs", "shifted_blobs", seed)]["status"] == "ok"
        failed = status[("FailsOnTwoInputs", "rotated_moons", seed)]
        assert failed["status"] == "failed"
        assert failed["error"] == "ValueError: FailsOnTwoInputs refuses 2-D inputs"
        assert failed["target_accuracy"] is None
        diverged = status[("nan_loss", "shifted_blobs", seed)]
        assert diverged["status"] == "diverged" and diverged["error"].startswith("DivergenceError: ")
    record = json.loads((tmp_path / "cells/rotated_moons/FailsOnTwoInputs/seed0" / FAILURE).read_text())
    assert record["status"] == "failed" and "Traceback" in record["traceback"]
    assert result.counts == {"ok": 6, "failed": 2, "diverged": 4}

    report = result.report.read_text(encoding="utf-8")
    assert re.search(r"rotated_moons / FailsOnTwoInputs / seed 0: \*\*failed\*\* — "
                     r"`ValueError: FailsOnTwoInputs refuses 2-D inputs`", report)
    assert "shifted_blobs / nan_loss / seed 1: **diverged**" in report
    assert "2 diverged" in report  # the excluded column

    again = run_grid(**tiny(tmp_path, methods=methods, retry_failed=False))
    assert (again.ran, again.reused) == (0, 12)  # failures kept, not retried
    retried = run_grid(**tiny(tmp_path, methods=methods))
    assert retried.ran == 6 and retried.counts == result.counts  # failures retried by default, same outcome


def test_report_and_results_of_a_tiny_grid(finished):
    out = finished.out_dir
    header = next(csv.reader(open(out / "results.csv", encoding="utf-8")))
    assert header == ["method", "shift", "seed", "status", "target_accuracy", "source_val_accuracy", "steps",
                      "wall_seconds", "error", "score/target_entropy"]
    rows = read_results_csv(out / "results.csv")
    assert rows == finished.rows and len(rows) == 8
    assert all(r["status"] == "ok" and r["steps"] == 20 and r["wall_seconds"] > 0 for r in rows)
    summary = json.loads((out / "cells/shifted_blobs/coral/seed1/summary.json").read_text())
    row = next(r for r in rows if (r["method"], r["shift"], r["seed"]) == ("coral", "shifted_blobs", 1))
    assert row["target_accuracy"] == summary["target_accuracy"]
    assert row["source_val_accuracy"] == summary["source_val_accuracy"]
    assert row["score/target_entropy"] == summary["final"]["score/target_entropy"]
    assert json.loads((out / "cells/shifted_blobs/coral/seed1" / CELL_SPEC).read_text())["seed"] == 1

    text = finished.report.read_text(encoding="utf-8")
    assert REPORT_NOTE in text
    for name in ("## Shift: rotated_moons", "## Shift: shifted_blobs", "| source_only |", "| coral |",
                 "coral − source_only", "## Average rank across shifts", "None: every run finished",
                 "## Recipes (shared by every method on a shift)", "20 steps, batch size 16"):
        assert name in text
    for png in ("accuracy_rotated_moons.png", "curves_rotated_moons.png", "curves_shifted_blobs.png"):
        assert (out / png).read_bytes()[:4] == b"\x89PNG" and f"]({png})" in text
    table = finished.table()
    assert table.splitlines()[0].split() == ["target", "acc.", "%", "rotated_moons", "shifted_blobs"]
    assert [line.split()[0] for line in table.splitlines()[2:]] == ["source_only", "coral"]


def test_a_users_loss_joins_the_grid_with_one_override(tmp_path, monkeypatch):
    monkeypatch.chdir(ROOT)  # 'examples.my_alignment' is found from the repository root, as on the command line
    cfg = compose_bench(["bench=tiny", "add_method=examples.my_alignment.energy_distance",  # the one override
                         f"out_dir={tmp_path}", "workers=1", "verbose=false", "recipes.rotated_moons.steps=20",
                         "recipes.shifted_blobs.steps=20"])
    result = execute(plan_grid(cfg))
    mine = [r for r in result.rows if r["method"] == "energy_distance"]
    assert len(mine) == 4 and all(r["status"] == "ok" for r in mine)
    assert result.plan.reference == "energy_distance"  # the added method is what the others are compared with
    text = result.report.read_text(encoding="utf-8")
    assert "| energy_distance |" in text and "energy_distance − source_only" in text
    assert "coral − energy_distance" in text
    assert "energy_distance" in result.table()
    config = (tmp_path / "cells/rotated_moons/energy_distance/seed0/config.yaml").read_text()
    assert "feature_loss" in config and "energy_distance" in config


def test_energy_distance_is_zero_on_equal_batches_and_positive_apart():
    from examples.my_alignment import energy_distance, mean_gap

    x = torch.randn(32, 4, generator=torch.Generator().manual_seed(0))
    assert float(energy_distance(x, x)) < 1e-3
    assert float(energy_distance(x, x + 3.0)) > 1.0 and float(mean_gap(x, x + 3.0)) == pytest.approx(36.0, rel=1e-5)
