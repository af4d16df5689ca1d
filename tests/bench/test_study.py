"""The selection study end to end: a tiny study (2 methods × 1 shift × 2 candidates × 2 seeds, 20 steps) records
every score, writes selection.md and selection.csv, resumes through the study command, and refuses a study with
nothing to choose."""
import csv
import json
import re

import numpy as np
import pytest
from omegaconf import OmegaConf

from adaptkit.bench.app import study_command
from adaptkit.bench.config import load_config
from adaptkit.bench.judge import ORACLE, RANDOM, RULE_PREFIX, RULES
from adaptkit.bench.report import SELECTION_CSV, SELECTION_MD
from adaptkit.bench.study import run_study
from adaptkit.select import SCORES

from .helpers import study_settings


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    return run_study(None, **study_settings(tmp_path_factory.mktemp("study")), command="pytest")


def test_a_tiny_study_records_every_score_at_the_final_evaluation(study):
    out = study.grid.out_dir
    assert study.grid.counts == {"ok": 8} and len(study.groups) == 4
    summary = json.loads((out / "cells/rotated_moons/dann__weight3.0/seed1/summary.json").read_text())
    assert summary["final"]["step"] == 20
    for s in SCORES:
        assert summary["final"][f"score/{s}"] is not None
    assert not (out / "report.md").exists() and (out / "results.csv").exists()


def test_a_tiny_study_writes_selection_md_and_csv_with_every_score(study):
    out = study.grid.out_dir
    text = (out / SELECTION_MD).read_text(encoding="utf-8")
    assert "No label-free score replaces a labelled target sample" in text
    for part in ("## All groups", "## Per shift", "## Per method", "## What this study does not show",
                 "**Toy data.**", "**Small sweeps.**", "**dann** (2 candidates): weight ∈ {0.3, 3.0}",
                 "Command: `pytest`", "labelled target test samples"):
        assert part in text
    rules = [RULE_PREFIX + r for r in RULES]  # selection rules are judged beside the single scores
    for name in list(SCORES) + rules + [RANDOM, ORACLE]:
        assert re.search(rf"^\| {re.escape(name)} \| .* \| 4 \| ", text, re.M), name  # a row over the 4 groups
    rows = list(csv.DictReader(open(out / SELECTION_CSV, encoding="utf-8")))
    assert len(rows) == 4 * (len(SCORES) + len(rules) + 2)
    for r in rows:
        regret = float(r["regret"])
        assert regret == pytest.approx(float(r["best_accuracy"]) - float(r["picked_accuracy"]), abs=1e-6)
        assert 0.0 <= regret <= 1.0
    assert all(float(r["regret"]) == 0.0 for r in rows if r["score"] == ORACLE)
    by_score = {s.score: s for s in study.summaries}
    assert set(by_score) == set(SCORES) | set(rules) | {RANDOM, ORACLE}
    assert by_score["dev"].regret.mean == pytest.approx(np.mean([float(r["regret"]) for r in rows
                                                                 if r["score"] == "dev"]))


def test_the_study_command_runs_a_config_with_a_sweep_and_resumes(study, capsys):
    cfg = OmegaConf.create(load_config(None, study_settings(study.grid.out_dir)))
    again = study_command(cfg)  # what `adaptkit-study` calls
    assert (again.grid.ran, again.grid.reused) == (0, 8)
    assert [s.regret.mean for s in again.summaries] == [s.regret.mean for s in study.summaries]
    printed = capsys.readouterr().out
    assert "regret pp ± 95% CI" in printed and "selection:" in printed
    assert "No label-free score replaces a labelled target sample" in printed


def test_a_study_without_a_choice_is_refused(tmp_path):
    with pytest.raises(ValueError, match=re.escape("A selection study needs a sweep")):
        run_study(None, **study_settings(tmp_path, sweep={}))
    with pytest.raises(ValueError, match=re.escape("gives every method a single candidate")):
        run_study(None, **study_settings(tmp_path, methods=["source_only"], sweep={"weight": [1.0]}))
    assert not (tmp_path / "cells").exists()
