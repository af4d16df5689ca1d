"""One cell: the worker trains a plain task into its folder, records a failure instead of raising, and the readers
give back what the run wrote (checked against the run's own summary.json and metrics.jsonl, read with json)."""
import json

import pytest

from adaptkit.bench.cell import FAILURE, cell_curve, cell_row, cell_state, make_task, read_json, run_cell
from adaptkit.bench.plan import plan_grid

from .helpers import MOONS, tiny


@pytest.fixture(scope="module")
def plan(tmp_path_factory):
    out = tmp_path_factory.mktemp("cells")
    return plan_grid(**tiny(out, methods=["source_only", "tests.bench.helpers.FailsOnTwoInputs"], shifts=[MOONS],
                            seeds=[0], scores=["target_entropy"]))


def test_a_task_is_plain_data_that_crosses_a_process_boundary(plan):
    task = make_task(plan, plan.cells[0])
    assert json.loads(json.dumps(task)) == task  # nothing but JSON values travel to a worker
    assert task["dir"] == str(plan.out_dir / "cells/rotated_moons/source_only/seed0")
    assert task["recipe"] == plan.recipes["rotated_moons"] and task["scores"] == ["target_entropy"]


def test_a_trained_cell_reads_back_as_its_summary_and_metrics(plan):
    cell = plan.cells[0]
    d = plan.out_dir / cell.relpath
    task = make_task(plan, cell)
    h = task["config_hash"]
    assert cell_state(d, h) == "new" and cell_row(cell, d, h) is None and cell_curve(d) == []
    out = run_cell(task)
    assert out["status"] == "ok" and out["error"] is None and out["seconds"] > 0
    assert cell_state(d, h) == "finished"

    summary = json.loads((d / "summary.json").read_text())
    assert summary["config_hash"] == h  # the parent's planned hash is what the run recorded
    row = cell_row(cell, d, h)
    assert row["target_accuracy"] == summary["target_accuracy"] == out["target_accuracy"]
    assert row["source_val_accuracy"] == summary["source_val_accuracy"] and row["steps"] == 20
    assert row["score/target_entropy"] == summary["final"]["score/target_entropy"]
    assert (row["method"], row["shift"], row["seed"], row["status"]) == ("source_only", "rotated_moons", 0, "ok")
    records = [json.loads(line) for line in (d / "metrics.jsonl").read_text().splitlines()]
    expected = [(r["step"], r["target_accuracy"]) for r in records if r.get("target_accuracy") is not None]
    assert cell_curve(d) == expected and [s for s, _ in expected] == [10, 20]  # eval_every 10 of 20 steps


def test_a_failing_cell_records_its_failure_instead_of_raising(plan):
    cell = plan.cells[1]
    d = plan.out_dir / cell.relpath
    task = make_task(plan, cell)
    out = run_cell(task)
    assert out["status"] == "failed" and out["error"] == "ValueError: FailsOnTwoInputs refuses 2-D inputs"
    record = read_json(d / FAILURE)
    assert record["status"] == "failed" and "Traceback" in record["traceback"] and record["wall_seconds"] >= 0
    assert record["config_hash"] == task["config_hash"] is not None
    assert cell_state(d, task["config_hash"]) == "failed"
    row = cell_row(cell, d, task["config_hash"])
    assert (row["status"], row["error"], row["target_accuracy"]) == ("failed", out["error"], None)


def test_a_torn_file_reads_as_absent(tmp_path):
    (tmp_path / "summary.json").write_text('{"status": "fini')
    assert read_json(tmp_path / "summary.json") is None and read_json(tmp_path / "absent.json") is None
    assert cell_state(tmp_path, "0123") == "new"
    (tmp_path / "checkpoint.pt").write_bytes(b"")
    assert cell_state(tmp_path, "0123") == "started"


@pytest.mark.parametrize("method, extra", [("coral", {"guard": True}), ("examples.my_alignment.energy_distance", {})],
                         ids=["guarded", "import_path"])
def test_the_planned_hash_is_the_hash_the_run_records(tmp_path, method, extra):
    """What a grid compares a cell's summary with (adaptkit.run.settings_hash, computed before training) is what
    the run writes into summary.json — also for a guarded run (which keeps another candidate's checkpoint) and a
    method given by import path (whose options are recorded in full)."""
    from adaptkit.config import run_config
    from adaptkit.run import settings_hash, train

    c = run_config({"steps": 20, "batch_size": 16, "eval_every": 10, **extra}, method={"name": method},
                   data={"name": "rotated_moons", "n_source": 60, "n_target": 60}, run_dir=str(tmp_path / "run"),
                   progress=False)
    planned = settings_hash(c)
    train(c)
    assert read_json(tmp_path / "run" / "summary.json")["config_hash"] == planned
    assert planned != settings_hash(run_config({**vars(c), "steps": 21}))  # the steps are in it
    assert planned == settings_hash(run_config({**vars(c), "device": "cpu", "run_dir": "elsewhere"}))  # not where
