"""adaptkit-runs: one table (runs.csv, runs.md) of the run folders under a parent folder — the settings that differ,
target accuracy where the target is labelled, label-free scores, status — read back with the standard csv module."""
import csv
import json
import shutil

import numpy as np
import pytest
from sklearn.datasets import make_moons

import adaptkit
from adaptkit.bench.runs import summarise_runs
from adaptkit.cli import runs_main

MOONS = {"n_source": 100, "n_target": 100}
SCORES = ["info_max", "dev"]


@pytest.fixture(scope="module")
def parent(tmp_path_factory):
    root = tmp_path_factory.mktemp("sweep")
    for name, weight in (("w1", 1.0), ("w2", 2.0)):
        adaptkit.fit("rotated_moons", method="coral", weight=weight, steps=20, eval_every=10, scores=SCORES,
                     progress=False, run_dir=str(root / name), data_options=MOONS, diagnostics=False)
    # a target without labels: nothing to score target accuracy with
    xs, ys = make_moons(120, noise=0.1, random_state=0)
    xt, _ = make_moons(120, noise=0.1, random_state=1)
    pair = adaptkit.DomainPair(xs, ys, xt + np.array([0.5, 0.0]), None, name="unlabelled")
    adaptkit.fit(pair, method="coral", weight=1.0, steps=20, eval_every=10, scores=SCORES, progress=False,
                 run_dir=str(root / "nolabels"), diagnostics=False)
    # an unfinished run: its checkpoint and config, no summary yet
    (root / "unfinished").mkdir()
    for f in ("config.yaml", "checkpoint.pt"):
        shutil.copy(root / "w1" / f, root / "unfinished" / f)
    return root


def test_the_table_lists_each_run_with_the_settings_that_differ(parent):
    result = summarise_runs(parent)
    with open(result.csv_path, newline="", encoding="utf-8") as f:  # the standard library's reader
        rows = {r["folder"]: r for r in csv.DictReader(f)}
    assert sorted(rows) == ["nolabels", "unfinished", "w1", "w2"]
    columns = result.columns
    assert "method.weight" in columns and "data.name" in columns  # they differ
    assert "method.name" not in columns and "seed" not in columns and "batch_size" not in columns  # same everywhere
    assert rows["w1"]["method.weight"] == "1.0" and rows["w2"]["method.weight"] == "2.0"
    for name in ("w1", "w2", "nolabels"):
        summary = json.loads((parent / name / "summary.json").read_text())
        r = rows[name]
        assert r["status"] == "finished"
        want = summary["target_accuracy"]
        assert (r["target_accuracy"] == "") if want is None else (float(r["target_accuracy"]) == want)
        assert float(r["source_val_accuracy"]) == summary["source_val_accuracy"]
        for s in SCORES:  # the label-free scores of the kept (last) state, exactly as recorded
            assert float(r[f"score/{s}"]) == summary["final"][f"score/{s}"]
    assert rows["nolabels"]["target_accuracy"] == "" and rows["w1"]["target_accuracy"] != ""
    assert rows["unfinished"]["status"] == "started" and rows["unfinished"]["target_accuracy"] == ""


def test_the_markdown_table_names_the_direction_of_each_score(parent):
    result = summarise_runs(parent, out_dir=parent / "out")
    lines = result.md_path.read_text().splitlines()
    assert len(lines) == 2 + 4 and lines[0].startswith("| folder | status |")
    # information maximisation is maximised; DEV estimates a risk, so lower is better (Deep Embedded Validation,
    # You, Wang, Chen, Long & Wang, ICML 2019)
    assert "score/info_max (higher is better)" in lines[0] and "score/dev (lower is better)" in lines[0]
    unlabelled = next(ln for ln in lines if ln.startswith("| nolabels |"))
    assert "| – |" in unlabelled  # no target accuracy without target labels
    assert (parent / "out" / "runs.csv").exists()


def test_the_command_prints_the_table_and_refuses_an_empty_folder(parent, tmp_path, capsys):
    runs_main([str(parent), "--out", str(tmp_path)])
    out = capsys.readouterr().out
    assert "4 run folder(s)" in out and "w2" in out and (tmp_path / "runs.md").exists()
    with pytest.raises(SystemExit) as e:
        runs_main([str(tmp_path / "empty_does_not_exist")])
    assert e.value.code == 2 and "is not a folder" in capsys.readouterr().err
    (tmp_path / "empty").mkdir()
    with pytest.raises(SystemExit):
        runs_main([str(tmp_path / "empty")])
    assert "no run folder" in capsys.readouterr().err
