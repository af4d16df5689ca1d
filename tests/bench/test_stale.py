"""Grids that cannot mix settings (issue 13, case 1): a cell's record counts only when the config hash it records
is the hash of the cell's planned settings, and the newest record of a cell wins.

The reproduction: a grid is run, its recipe's steps are changed and it is rerun with ``overwrite=true`` while a
worker of the first run — orphaned by a ``kill -9`` of its parent — writes the old settings' summary into a cell
of the new run. That is simulated exactly: the cell's old ``summary.json`` is copied back into its folder after the
new grid trained it (one worker, so cells run in this process and ``run_cell`` can be wrapped). Grids here are
2 methods × 1 shift × 2 seeds of 20–30 steps on 60 points."""
import json
import os
import re
import shutil

import pytest

from adaptkit.bench import grid as grid_module
from adaptkit.bench.report import read_results_csv

from .helpers import MOONS, NET, tiny

OLD, NEW = 20, 30  # the recipe's steps before and after the change


def settings(out, steps, **kw):
    return tiny(out, shifts=[MOONS], recipes={"rotated_moons": {**NET, "steps": steps}}, **kw)


def test_a_summary_of_other_settings_is_never_counted_as_ok(tmp_path, monkeypatch):
    out = tmp_path / "grid"
    first = grid_module.run_grid(**settings(out, OLD))
    assert first.counts == {"ok": 4}
    victim = out / "cells/rotated_moons/coral/seed1"
    old = tmp_path / "old_cell"
    shutil.copytree(victim, old)  # what the orphaned worker of the first run holds for this cell

    real = grid_module.run_cell

    def run_cell_with_an_orphan(task):
        result = real(task)
        if task["dir"] == str(victim):  # the orphan finishes "its" cell after the new grid trained it
            shutil.copy2(old / "summary.json", victim / "summary.json")
            os.utime(victim / "summary.json")  # written now: the newest record of the cell
        return result

    monkeypatch.setattr(grid_module, "run_cell", run_cell_with_an_orphan)
    second = grid_module.run_grid(**settings(out, NEW, overwrite=True))
    monkeypatch.setattr(grid_module, "run_cell", real)

    rows = read_results_csv(out / "results.csv")
    assert len(rows) == 4
    stale = [r for r in rows if r["status"] == "stale"]
    assert [(r["method"], r["seed"]) for r in stale] == [("coral", 1)]
    assert stale[0]["steps"] is None and stale[0]["target_accuracy"] is None
    recorded = json.loads((old / "summary.json").read_text())["config_hash"]
    assert f"config hash {recorded!r}" in stale[0]["error"]
    # every row that counts carries the steps of its cell's planned settings (cell.json, written by the new grid)
    for r in rows:
        if r["status"] == "ok":
            spec = json.loads((out / "cells/rotated_moons" / r["method"] / f"seed{r['seed']}/cell.json").read_text())
            assert r["steps"] == spec["recipe"]["steps"] == NEW
    assert second.counts == {"ok": 3, "stale": 1}
    report = (out / "report.md").read_text(encoding="utf-8")
    assert "3 ok, 0 failed, 0 diverged, 1 stale" in report
    assert "rotated_moons / coral / seed 1: **stale**" in report

    # a rerun does not reuse the stale cell: it is refused by name, and overwrite=true retrains it
    with pytest.raises(ValueError, match=re.escape("(rotated_moons/coral/seed1; compare their cell.json, and the "
                                                   "config_hash in their summary.json or failure.json)")):
        grid_module.run_grid(**settings(out, NEW))
    third = grid_module.run_grid(**settings(out, NEW, overwrite=True))
    assert third.counts == {"ok": 4} and all(r["steps"] == NEW for r in read_results_csv(out / "results.csv"))


def test_the_newest_record_of_a_cell_wins(tmp_path):
    out = tmp_path / "grid"
    s = settings(out, OLD, methods=["source_only"], seeds=[0])
    first = grid_module.run_grid(**s)
    cell = out / "cells/rotated_moons/source_only/seed0"
    summary = json.loads((cell / "summary.json").read_text())
    t = (cell / "summary.json").stat().st_mtime_ns

    # a failure written after the summary (say, the diagnostics raised after training) outranks it
    failure = {"status": "failed", "error": "RuntimeError: diagnostics failed", "traceback": "", "step": OLD,
               "wall_seconds": 1.0, "config_hash": summary["config_hash"]}
    (cell / "failure.json").write_text(json.dumps(failure))
    os.utime(cell / "failure.json", ns=(t + 10**9, t + 10**9))
    plan = grid_module.plan_grid(None, **s)
    rows, _, _ = grid_module.collect_results(plan)
    assert [(r["status"], r["error"]) for r in rows] == [("failed", "RuntimeError: diagnostics failed")]

    # and vice versa: a summary written after the failure is the cell's result
    os.utime(cell / "summary.json", ns=(t + 2 * 10**9, t + 2 * 10**9))
    rows, _, _ = grid_module.collect_results(plan)
    assert [r["status"] for r in rows] == ["ok"] and rows[0]["target_accuracy"] == summary["target_accuracy"]

    # a newer failure makes a rerun retry the cell: it resumes from its last checkpoint to the same numbers
    os.utime(cell / "failure.json", ns=(t + 3 * 10**9, t + 3 * 10**9))
    again = grid_module.run_grid(**s)
    assert (again.ran, again.counts) == (1, {"ok": 1}) and not (cell / "failure.json").exists()
    assert again.rows[0]["target_accuracy"] == first.rows[0]["target_accuracy"]
