"""The hydra face: shipped configs compose, the CLI writes a run folder, bad keys fail at composition."""
import json
import os
import subprocess
import sys

import pytest
import yaml

from adaptkit.config import CONFIG_DIR, compose
from adaptkit.data.shifts import SHIFTS
from adaptkit.methods import METHODS
from adaptkit.nets import ENCODERS, HEADS

CLI = [sys.executable, "-c", "from adaptkit.cli import train_main; train_main()"]
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "HYDRA_FULL_ERROR": "0"}


@pytest.mark.parametrize("group, registry", [("method", METHODS), ("encoder", ENCODERS), ("head", HEADS),
                                             ("data", SHIFTS)], ids=["method", "encoder", "head", "data"])
def test_every_registry_name_has_a_yaml_file_and_vice_versa(group, registry):
    files = {p.stem for p in (CONFIG_DIR / group).glob("*.yaml")}
    assert files == set(registry.names())
    for p in (CONFIG_DIR / group).glob("*.yaml"):
        assert yaml.safe_load(p.read_text())["name"] == p.stem  # config name = registry name = file name


def _every_shipped_choice():
    for group in ("method", "encoder", "head", "data", "optim"):
        for p in sorted((CONFIG_DIR / group).glob("*.yaml")):
            yield f"{group}={p.stem}"


@pytest.mark.parametrize("override", list(_every_shipped_choice()))
def test_every_shipped_config_composes(override):
    cfg = compose([override])
    group, name = override.split("=")
    if group != "optim":
        assert cfg[group].name == name


def test_composition_refuses_typos_and_wrong_types():
    from hydra.errors import ConfigCompositionException

    with pytest.raises(ConfigCompositionException, match="Could not override 'stpes'"):
        compose(["stpes=3"])
    with pytest.raises(ConfigCompositionException, match="steps=abc"):
        compose(["steps=abc"])
    with pytest.raises(ConfigCompositionException):
        compose(["optim.lr=fast"])


def test_cli_writes_a_run_folder_and_refuses_to_overwrite(tmp_path):
    rd = tmp_path / "run"
    args = CLI + ["method=source_only", "data=rotated_moons", "data.n_source=100", "data.n_target=100", "steps=40",
                  "eval_every=20", "seed=3", f"run_dir={rd}", f"hydra.run.dir={tmp_path / 'hydra'}"]
    out = subprocess.run(args, capture_output=True, text=True, env=ENV, timeout=120)
    assert out.returncode == 0, out.stderr
    assert "source_only on rotated_moons seed 3" in out.stdout and "can silently make a model worse" in out.stdout
    summary = json.loads((rd / "summary.json").read_text())
    assert summary["method"] == "source_only" and summary["seed"] == 3 and summary["steps"] == 40
    assert summary["target_accuracy"] is not None
    saved = yaml.safe_load((rd / "config.yaml").read_text())
    assert saved["data"] == {"name": "rotated_moons", "n_source": 100, "n_target": 100, "angle": 30.0,
                             "noise": 0.1, "seed": 3}
    again = subprocess.run(args, capture_output=True, text=True, env=ENV, timeout=120)
    assert again.returncode == 2 and "already holds a finished run" in again.stderr


def test_cli_names_an_unknown_method_option(tmp_path):
    args = CLI + ["method=coral", "+method.wieght=2", "steps=2", f"hydra.run.dir={tmp_path}"]
    out = subprocess.run(args, capture_output=True, text=True, env=ENV, timeout=120)
    assert out.returncode == 2
    assert "Unknown option 'wieght' for method 'coral'. Accepted options:" in out.stderr


def test_compose_then_fit_from_a_notebook(tmp_path):
    from adaptkit.config import fit_from_config

    cfg = compose(["data=shifted_blobs", "data.n_source=90", "data.n_target=90", "steps=10", "eval_every=5"])
    run = fit_from_config(cfg, run_dir=str(tmp_path))
    assert run.summary["data"] == "shifted_blobs" and len(run.history) == 2
