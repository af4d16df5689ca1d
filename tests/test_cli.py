"""The hydra face: shipped configs compose, the CLI writes a run folder, bad keys fail at composition."""
import json
import os
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor

import pytest
import yaml

from adaptkit.config import CONFIG_DIR, compose
from adaptkit.data.shifts import SHIFTS
from adaptkit.methods import METHODS
from adaptkit.nets import ENCODERS, HEADS

CLI = [sys.executable, "-c", "from adaptkit.cli import train_main; train_main()"]
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "HYDRA_FULL_ERROR": "0"}


GROUP_REGISTRIES = [("method", METHODS), ("encoder", ENCODERS), ("head", HEADS), ("data", SHIFTS)]


def _store_options(group):
    from hydra.core.config_store import ConfigStore

    from adaptkit.config import register_configs

    register_configs()
    return {k[:-len(".yaml")] for k in ConfigStore.instance().repo[group]}


@pytest.mark.parametrize("group, registry", GROUP_REGISTRIES, ids=[g for g, _ in GROUP_REGISTRIES])
def test_every_registry_name_is_a_config_choice_and_vice_versa(group, registry):
    # config name = registry name: each registered component is a choice of its hydra group, and no choice lacks
    # a component; the YAML files hold presets only, so none may shadow a registered component's schema
    assert _store_options(group) == set(registry.names())
    assert not (CONFIG_DIR / group).exists() or not list((CONFIG_DIR / group).glob("*.yaml"))


@pytest.mark.parametrize("group, registry", GROUP_REGISTRIES, ids=[g for g, _ in GROUP_REGISTRIES])
def test_a_component_schema_is_its_options_dataclass(group, registry):
    # one copy of every default: the config's fields and defaults are read from the component itself
    import dataclasses
    import inspect

    from adaptkit.config import component_schema

    for name in registry.names():
        schema = {f.name: (f.default if f.default is not dataclasses.MISSING else f.default_factory())
                  for f in dataclasses.fields(component_schema(group, name))}
        assert schema.pop("name") == name
        obj = registry.get(name)
        if group == "data":
            own = {p: v.default for p, v in inspect.signature(obj).parameters.items()}
            own["seed"] = None  # the data draw follows the run's seed unless set
        else:
            opts = obj.Options()
            own = {f.name: getattr(opts, f.name) for f in dataclasses.fields(opts)}
        assert schema == own


def _every_choice():
    for group, registry in GROUP_REGISTRIES:
        for name in registry.names():
            yield f"{group}={name}"
    for p in sorted((CONFIG_DIR / "optim").glob("*.yaml")):
        yield f"optim={p.stem}"


@pytest.mark.parametrize("override", list(_every_choice()))
def test_every_config_choice_composes(override):
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


def test_compose_then_train_from_a_notebook(tmp_path):
    import adaptkit

    cfg = compose(["data=shifted_blobs", "data.n_source=90", "data.n_target=90", "steps=10", "eval_every=5",
                   f"run_dir={tmp_path}"])
    run = adaptkit.train(cfg)
    assert run.summary["data"] == "shifted_blobs" and len(run.history) == 2


def test_cli_checks_every_run_before_hydra_writes_anything(tmp_path):
    # a typo, a wrong type or a bad value in any run of a sweep fails at once, in one line, and no folder appears
    cases = [
        (["method=mmd", "method.kernels=3"],
         "Unknown option 'kernels' for method 'mmd' (override 'method.kernels'). Accepted options: weight, "
         "weight_schedule, estimator, n_kernels, kernel_mul"),
        (["stpes=3"], "Unknown setting 'stpes'. Accepted settings: method, encoder"),
        (["method=mmd", "method.n_kernels=abc"], "could not be converted to Integer"),
        (["method.name=../../../x"], "is not of the form 'package.module.attribute'"),
        (["-m", "method=coral", "method.weight=1,-2"],
         "The 'weight' parameter of method 'coral' must be in the range [0, inf). Got -2.0 instead."),
    ]
    # the cases are independent: two at a time (the test process idles while they start torch)
    with ThreadPoolExecutor(2) as pool:
        outs = list(pool.map(lambda args: subprocess.run(
            CLI + args + [f"hydra.run.dir={tmp_path / 'run'}", f"hydra.sweep.dir={tmp_path / 'm'}"],
            capture_output=True, text=True, env=ENV, timeout=120, cwd=tmp_path), [a for a, _ in cases]))
    for (args, message), out in zip(cases, outs):
        assert out.returncode == 2, (args, out.stderr)
        lines = [ln for ln in out.stderr.splitlines() if ln.strip()]
        assert len(lines) == 1 and message in lines[0], (args, out.stderr)
        assert sorted(p.name for p in tmp_path.iterdir()) == [], args


def test_a_second_writer_to_a_run_folder_is_refused_and_the_first_finishes(tmp_path):
    import time

    rd = tmp_path / "run"
    common = ["data.n_source=100", "data.n_target=100", "eval_every=100", f"run_dir={rd}",
              f"hydra.run.dir={tmp_path / 'hydra'}"]
    first = subprocess.Popen(CLI + ["steps=3000"] + common, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                             text=True, env=ENV)
    try:
        deadline = time.time() + 60
        while not (rd / ".lock").exists() or not (rd / ".lock").read_text():  # the first has started
            assert time.time() < deadline and first.poll() is None, first.communicate()
            time.sleep(0.1)
        second = subprocess.run(CLI + ["steps=3000"] + common, capture_output=True, text=True, env=ENV, timeout=120)
        assert second.returncode == 75, second.stderr
        assert f"run folder '{rd}' is in use by process {first.pid}" in second.stderr
        out, err = first.communicate(timeout=300)
        assert first.returncode == 0, err
    finally:
        first.kill()
    assert json.loads((rd / "summary.json").read_text())["steps"] == 3000


def test_with_run_dir_given_hydra_writes_nothing_of_its_own(tmp_path):
    # issue 13, case 9: hydra used to create runs/<data>/<method>/seed<k>/ with .hydra/*.yaml and cli.log in the
    # current directory although the run went to run_dir; now nothing appears outside the run folder, nor in it
    cwd, rd = tmp_path / "cwd", tmp_path / "elsewhere" / "run"
    cwd.mkdir()
    out = subprocess.run(CLI + ["steps=5", "eval_every=5", "data.n_source=60", "data.n_target=60", f"run_dir={rd}"],
                         capture_output=True, text=True, env=ENV, timeout=120, cwd=cwd)
    assert out.returncode == 0, out.stderr
    assert list(cwd.iterdir()) == []
    assert sorted(p.name for p in rd.iterdir()) == [".lock", "checkpoint.pt", "config.yaml", "diagnostics.json",
                                                   "metrics.jsonl", "plots", "summary.json"]


def test_help_says_what_the_command_does_and_lists_only_its_own_groups(tmp_path):
    out = subprocess.run(CLI + ["--help"], capture_output=True, text=True, env=ENV, timeout=120, cwd=tmp_path)
    assert out.returncode == 0, out.stderr[-2000:]
    text = out.stdout
    assert text.startswith("adaptkit-train: train one run") and "powered by Hydra" not in text
    groups = text.split("== Configuration groups (group=option) ==")[1].split("==")[0]
    from adaptkit.methods import METHODS

    assert f"method: {', '.join(METHODS.names())}" in groups  # every registered method, from the registry
    assert "bench:" not in groups  # the grids belong to adaptkit-bench
    assert "can silently make a model worse" in text and list(tmp_path.iterdir()) == []  # --help writes nothing
