"""Resume checks the run folder's own config (issue 13, case 10): a ``config.yaml`` edited by hand after the run
started used to be ignored silently on resume (the run went on with the checkpoint's settings, the folder then
describing another run). It is now refused, naming the differing settings; a garbled one names the file. Runs here
are 30 steps of source-only training on 60 points, stopped by removing the summary (the folder then holds an
unfinished run: a checkpoint at its last step)."""
import re

import pytest
import yaml

from adaptkit import fit

SETTINGS = dict(steps=30, batch_size=16, eval_every=10, checkpoint_every=10, progress=False, diagnostics=False)
DATA = {"n_source": 60, "n_target": 60}


def unfinished(tmp_path):
    rd = tmp_path / "run"
    fit("rotated_moons", method="source_only", data_options=DATA, run_dir=str(rd), **SETTINGS)
    (rd / "summary.json").unlink()
    return rd


def test_a_hand_edited_config_yaml_is_refused_on_resume_naming_the_settings(tmp_path):
    rd = unfinished(tmp_path)
    path = rd / "config.yaml"
    cfg = yaml.safe_load(path.read_text())  # PyYAML: an outside reader of the file
    cfg["batch_size"], cfg["optim"]["lr"] = 32, cfg["optim"]["lr"] * 10
    path.write_text(yaml.safe_dump(cfg))
    with pytest.raises(ValueError, match=re.escape(f"{path} no longer matches the checkpoint beside it (batch_size: "
                                                   f"16 -> 32; optim.lr: {cfg['optim']['lr'] / 10!r} -> "
                                                   f"{cfg['optim']['lr']!r}; checkpoint -> config.yaml)")):
        fit("rotated_moons", method="source_only", data_options=DATA, run_dir=str(rd), **SETTINGS)
    assert not (rd / "summary.json").exists()  # nothing was trained or written


def test_settings_that_do_not_change_the_numbers_may_differ_and_the_run_resumes(tmp_path):
    rd = unfinished(tmp_path)
    cfg = yaml.safe_load((rd / "config.yaml").read_text())
    cfg["checkpoint_every"], cfg["progress"] = 5, True  # management settings (adaptkit.config.MANAGEMENT)
    (rd / "config.yaml").write_text(yaml.safe_dump(cfg))
    run = fit("rotated_moons", method="source_only", data_options=DATA, run_dir=str(rd), **SETTINGS)
    assert run.summary["steps"] == 30 and (rd / "summary.json").exists()


def test_a_garbled_config_yaml_is_refused_naming_the_file(tmp_path):
    rd = unfinished(tmp_path)
    (rd / "config.yaml").write_text("steps: [30\n")
    with pytest.raises(ValueError, match=re.escape(f"{rd / 'config.yaml'} cannot be read as a config (")) as e:
        fit("rotated_moons", method="source_only", data_options=DATA, run_dir=str(rd), **SETTINGS)
    assert "\n" not in str(e.value)
