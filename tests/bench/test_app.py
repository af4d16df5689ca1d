"""The two bench commands: the command, not the config, chooses a grid or a selection study. ``adaptkit-bench``
refuses a config with a sweep in one line naming ``adaptkit-study``; ``adaptkit-study`` runs a tiny study
(1 method × 2 candidates × 1 seed × 20 steps on 60 points, one worker) and writes selection.md. The console
scripts' functions (``adaptkit.cli.bench_main``, ``study_main``) run in this process with their arguments in
``sys.argv``, as the scripts would; the subprocess path of the hydra apps is tested in tests/test_cli.py."""
import re
import sys

import pytest
from omegaconf import OmegaConf

from adaptkit import cli

from adaptkit.bench.app import STUDY_COMMAND, grid_command, study_command
from adaptkit.bench.config import compose_bench, load_config

from .helpers import study_settings



def run(main, args, monkeypatch, capsys):
    """``main()`` with ``args`` on its command line: ``(exit status, stdout, stderr)``."""
    monkeypatch.setattr(sys, "argv", [main.__name__] + args)
    monkeypatch.setenv("HYDRA_FULL_ERROR", "0")
    try:
        main()
        code = 0
    except SystemExit as e:
        code = e.code
    out = capsys.readouterr()
    return code, out.out, out.err


def test_the_grid_command_refuses_a_sweep_naming_the_study_command(tmp_path):
    cfg = OmegaConf.create(load_config(None, study_settings(tmp_path)))
    with pytest.raises(ValueError, match=re.escape(f"a sweep is a selection study, so run it with `{STUDY_COMMAND} ")):
        grid_command(cfg)
    assert not (tmp_path / "cells").exists()


def test_adaptkit_bench_with_a_sweep_exits_2_with_one_line_naming_adaptkit_study(tmp_path, monkeypatch, capsys):
    code, _, err = run(cli.bench_main, ["bench=selection", f"out_dir={tmp_path / 'grid'}",
                                        f"hydra.run.dir={tmp_path / 'h'}"], monkeypatch, capsys)
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("adaptkit-bench: error: ")
    assert "adaptkit-study bench=selection" in lines[0] and "weight, adapt_lr, lr" in lines[0]
    assert not (tmp_path / "grid").exists()  # refused before anything was written


def test_adaptkit_study_runs_a_tiny_study(tmp_path, monkeypatch, capsys):
    out_dir = tmp_path / "study"
    args = ["methods=[coral]", "shifts=[{name:rotated_moons,params:{n_source:60,n_target:60}}]", "seeds=[0]",
                    "~sweep.lr", "~sweep.adapt_lr", "sweep.weight=[0.3,3.0]", "recipes.rotated_moons.steps=20",
                    "recipes.rotated_moons.eval_every=20", "recipes.rotated_moons.batch_size=16", "workers=1",
                    "verbose=false", f"out_dir={out_dir}", f"hydra.run.dir={tmp_path / 'h'}"]
    code, out, err = run(cli.study_main, args, monkeypatch, capsys)
    assert code == 0, err[-2000:]
    assert "regret pp ± 95% CI" in out and f"selection: {out_dir / 'selection.md'}" in out
    assert "No label-free score replaces a labelled target sample" in out
    text = (out_dir / "selection.md").read_text(encoding="utf-8")
    assert "1 method × 1 shift × 1 seed = 1 groups of candidates (2 finished candidates per group)" in text
    assert "**coral** (2 candidates): weight ∈ {0.3, 3.0}" in text and "Command: `adaptkit-study " in text
    assert not (out_dir / "report.md").exists()  # a study writes selection.md, not the grid's report
    assert sorted(p.name for p in (out_dir / "cells/rotated_moons").iterdir()) == ["coral__weight0.3",
                                                                                  "coral__weight3.0"]


def test_the_study_command_without_a_sweep_is_an_error(tmp_path):
    cfg = compose_bench(["bench=tiny", f"out_dir={tmp_path}"], config_name="study")  # what `adaptkit-study bench=tiny` runs
    with pytest.raises(ValueError, match=re.escape("A selection study needs a sweep")):
        study_command(cfg)
    assert not (tmp_path / "cells").exists()
