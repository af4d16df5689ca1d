"""The run schema (adaptkit/config.py): one definition of every run setting, read by every face."""
import dataclasses
import inspect
import re
from dataclasses import dataclass
from typing import List

import pytest

from adaptkit.config import (GROUPS, MANAGEMENT, SETTINGS, RunConfig, check, compose, config_hash, from_composed,
                             register_configs, resolve, run_config, setting_docs, typed_component)
from adaptkit.methods import METHODS
from adaptkit.methods.source_only import SourceOnly


def test_every_setting_has_a_comment_and_a_place_in_fits_signature():
    # one definition: fit's keyword arguments and help are generated from RunConfig, so they cannot drift
    import adaptkit

    docs = setting_docs()
    assert set(docs) == set(SETTINGS) and all(docs.values())
    params = inspect.signature(adaptkit.fit).parameters
    defaults = RunConfig()
    for name in SETTINGS:
        assert name in params
        if name not in GROUPS:
            assert params[name].default == getattr(defaults, name)
            assert f"{name}=" in adaptkit.fit.__doc__


def test_composed_defaults_are_runconfigs_defaults():
    # the hydra primary config is generated from RunConfig: composing nothing gives RunConfig() resolved
    assert resolve(from_composed(compose([]))) == resolve(RunConfig())


def test_run_config_refuses_unknown_settings_with_the_accepted_list():
    with pytest.raises(ValueError, match=re.escape("Unknown setting 'stpes' for a run. Accepted settings: method, "
                                                   "encoder, head, data, optim, steps,")):
        run_config({"stpes": 3})


def test_resolve_fills_defaults_and_checks_numbers():
    c = resolve(RunConfig(steps=250, seed=4))
    assert c.eval_every == 25 and c.data["seed"] == 4 and c.data["angle"] == 30.0
    assert c.method == {"name": "source_only"} and c.optim.name == "sgd"
    with pytest.raises(ValueError, match=re.escape("The 'batch_size' parameter of the run settings must be in the "
                                                   "range [1, inf). Got 0 instead.")):
        resolve(RunConfig(batch_size=0))
    with pytest.raises(ValueError, match="The 'on_nonfinite' parameter of the run settings must be one of"):
        resolve(RunConfig(on_nonfinite="ignore"))
    with pytest.raises(TypeError, match="The 'check_gradients' parameter of the run settings must be true or false"):
        resolve(RunConfig(check_gradients="yes"))


def test_typed_component_checks_like_hydra():
    # the same schema as at composition: values converted to the declared type, or refused naming the option
    assert typed_component("method", {"name": "mmd", "n_kernels": "3"})["n_kernels"] == 3
    assert typed_component("encoder", {"name": "mlp", "hidden": (8, 4)})["hidden"] == [8, 4]
    with pytest.raises(TypeError, match=re.escape("The 'n_kernels' option of method 'mmd' must be int. Got 'x'")):
        typed_component("method", {"name": "mmd", "n_kernels": "x"})
    with pytest.raises(ValueError, match=re.escape("Unknown option 'kernels' for method 'mmd'. Accepted options: "
                                                   "weight, weight_schedule, estimator, n_kernels")):
        typed_component("method", {"name": "mmd", "kernels": 3})
    with pytest.raises(ValueError, match=re.escape("Unknown parameter 'angel' for shift 'rotated_moons'")):
        typed_component("data", {"name": "rotated_moons", "angel": 3})
    with pytest.raises(ValueError, match="Unknown encoder 'resnet'. Available encoders: lenet, mlp, resnet18, resnet50, small_cnn"):
        typed_component("encoder", "resnet")


def test_the_hash_ignores_where_a_run_is_kept_but_not_its_numbers():
    a = resolve(RunConfig(method="coral"))
    assert config_hash(a) == config_hash(resolve(RunConfig(method="coral", run_dir="x", device="cpu",
                                                           progress=True, checkpoint_every=5)))
    assert config_hash(a) != config_hash(resolve(RunConfig(method="coral", seed=1)))
    assert config_hash(a) != config_hash(resolve(RunConfig(method={"name": "coral", "weight": 1.0})))
    assert set(MANAGEMENT) <= set(SETTINGS)


def test_check_builds_the_method_so_bad_option_values_fail_first():
    with pytest.raises(ValueError, match=re.escape("The 'weight' parameter of method 'coral' must be in the range")):
        check(RunConfig(method={"name": "coral", "weight": -1.0}))


# -- a new option is one line ----------------------------------------------------------------------------------
class _Probe(SourceOnly):
    name = "probe_method"

    @dataclass
    class Options:
        probe: int = 3  # the one line a new option takes
        widths: List[int] = dataclasses.field(default_factory=lambda: [2])


@pytest.fixture
def probe_method(monkeypatch):
    from hydra.core.config_store import ConfigStore

    monkeypatch.setitem(METHODS._table, "probe_method", _Probe)
    register_configs()
    yield "probe_method"
    ConfigStore.instance().repo["method"].pop("probe_method.yaml", None)


def test_a_new_method_option_is_accepted_and_type_checked_by_every_face(probe_method, tmp_path):
    import numpy as np
    from hydra.errors import ConfigCompositionException

    from adaptkit import AlignedClassifier, fit

    # the CLI's composition
    assert compose([f"method={probe_method}", "method.probe=5"]).method.probe == 5
    with pytest.raises(ConfigCompositionException):
        compose([f"method={probe_method}", "method.probe=many"])
    # the notebook
    run = fit("rotated_moons", method=probe_method, probe=4, steps=2, data_options={"n_source": 40, "n_target": 40},
              progress=False, device="cpu")
    assert run.method.options.probe == 4
    with pytest.raises(TypeError, match="The 'probe' option of method 'probe_method' must be int"):
        fit("rotated_moons", method=probe_method, probe="many", steps=2, progress=False)
    # scikit-learn
    rng = np.random.default_rng(0)
    X, y = rng.normal(size=(60, 2)), np.r_[np.arange(40) % 2, -np.ones(20, int)]
    clf = AlignedClassifier(method=probe_method, method_options={"probe": 6}, guard=False, max_steps=2, random_state=0,
                            device="cpu").fit(X, y)
    assert clf.run_.method.options.probe == 6
    # the benchmark grid
    from adaptkit.bench.grid import plan_grid

    plan = plan_grid("tiny", methods=[{"name": probe_method, "options": {"probe": 7}}], seeds=[0],
                     out_dir=str(tmp_path))
    assert plan.cells[0].method.options == {"probe": 7}
    with pytest.raises(TypeError, match="The 'probe' option of method 'probe_method' must be int"):
        plan_grid("tiny", methods=[{"name": probe_method, "options": {"probe": "many"}}], seeds=[0],
                  out_dir=str(tmp_path))
