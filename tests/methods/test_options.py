"""Every option of every registered method: refused when invalid (the message names it), kept by ``describe()``,
usable as a structured config, and never named like a run setting. Parametrised over the registry: a new method or
option fails here until it has its entries below."""
import dataclasses
import inspect
import typing

import pytest
from omegaconf import OmegaConf

from adaptkit import fit
from adaptkit.methods import METHODS, WeightOptions, build_method

ALL = METHODS.names()
LOSS_PATH = "adaptkit.losses.coral_distance"  # an importable (f_s, f_t) -> scalar function
REQUIRED = {"feature_loss": {"loss_fn": LOSS_PATH}}  # options a method cannot be built without

# option -> values that must be refused: a wrong type and, for numbers, a value out of range
INVALID = {
    "cdan": {"weight": [-1.0, "big"], "weight_schedule": ["dann_anneal", "ramp"], "gamma": [0.0, "ten"],
             "disc_hidden": ["64", [-1]], "entropy_weighting": ["yes", 1], "max_map_size": [-1, 2.5, "big"],
             "random_dim": [0, 1.5], "grad_through_predictions": ["no", 0]},
    "adda": {"pretrain_share": [0.0, 1.0, "half"], "disc_hidden": [64, [0], [8, 2.5]], "adapt_lr": [0.0, "fast"],
             "adapt_betas": [[0.5], [0.5, 1.0], [0.5, "x"], 0.5]},
    "adr": {"divergence": ["kl", 3], "n_generator_steps": [0, 2.5, "4"], "weight": [-1.0, "big", True]},
    "confusion": {"weight": [-1.0, "big", True], "weight_schedule": ["linear_ramp", "dann_anneal", 3],
                  "disc_hidden": [64, [0]]},
    "coral": {"weight": [-0.5, "big"], "weight_schedule": ["cosine", None]},
    "dann": {"weight": [-1.0, "big"], "weight_schedule": ["dann_anneal", "ramp"], "gamma": [0.0, -1.0, "ten"],
             "disc_hidden": ["64", [-1]]},
    "feature_loss": {"weight": [-1.0, "big"], "weight_schedule": ["linear"],
                     "loss_fn": [None, 3, "mmd2", "adaptkit.losses.no_such_loss"]},
    "mcd": {"n_generator_steps": [0, 2.5, "4"], "weight": [-1.0, "big", True]},
    "mmd": {"weight": [-1.0, "big"], "weight_schedule": ["step"], "estimator": ["quadratic", 1],
            "n_kernels": [0, 2.5], "kernel_mul": [1.0, 0.5, "two"]},
    "self_training": {"weight": [-1.0, "big"], "weight_schedule": ["dann_anneal", "ramp"],
                      "pretrain_share": [0.0, 1.0, "half"], "threshold": [-0.1, 1.5, "high"],
                      "class_balanced": ["yes", 1], "teacher": ["mean", 1], "teacher_decay": [1.0, -0.1, "high"]},
    "source_only": {},
    "target_oracle": {},
}

# option -> a valid value other than the default, to check that describe() keeps it
CHANGED = {
    "cdan": {"weight": 0.5, "weight_schedule": "constant", "gamma": 5.0, "disc_hidden": [32], "entropy_weighting": True,
             "max_map_size": 0, "random_dim": 64, "grad_through_predictions": True},
    "adda": {"pretrain_share": 0.3, "disc_hidden": [16], "adapt_lr": 0.001, "adapt_betas": [0.9, 0.99]},
    "adr": {"divergence": "l1", "n_generator_steps": 2, "weight": 0.5},
    "confusion": {"weight": 0.5, "weight_schedule": "dann_ramp", "disc_hidden": [8, 8]},
    "coral": {"weight": 10.0, "weight_schedule": "dann_ramp"},
    "dann": {"weight": 6.0, "weight_schedule": "constant", "gamma": 5.0, "disc_hidden": [32]},
    "feature_loss": {"weight": 0.1, "weight_schedule": "dann_ramp", "loss_fn": LOSS_PATH},
    "mcd": {"n_generator_steps": 2, "weight": 0.5},
    "mmd": {"weight": 3.0, "weight_schedule": "dann_ramp", "estimator": "linear", "n_kernels": 3, "kernel_mul": 1.5},
    "self_training": {"weight": 0.3, "weight_schedule": "dann_ramp", "pretrain_share": 0.25, "threshold": 0.95,
                      "class_balanced": True, "teacher": "ema", "teacher_decay": 0.9},
    "source_only": {},
    "target_oracle": {},
}

# the settings of a run: a method option of the same name would be shadowed by (or swallow) the run's own
RUN_SETTINGS = {"method", "encoder", "head", "data", "optim", "steps", "batch_size", "seed", "eval_every",
                "checkpoint_every", "scores", "select", "on_nonfinite", "check_gradients", "diagnostics", "device",
                "progress", "run_dir", "overwrite"}
RUN_SETTINGS |= {k for k, p in inspect.signature(fit).parameters.items() if p.kind is not p.VAR_KEYWORD}


def _options(name):
    return [f.name for f in dataclasses.fields(METHODS.get(name).Options)]


@pytest.mark.parametrize("name", ALL)
def test_the_tables_cover_every_option(name):
    assert sorted(INVALID[name]) == sorted(_options(name))
    assert sorted(CHANGED[name]) == sorted(_options(name))


@pytest.mark.parametrize("name, option, value",
                         [(n, o, v) for n in ALL for o, vs in INVALID[n].items() for v in vs])
def test_an_invalid_value_is_refused_naming_the_option(name, option, value):
    with pytest.raises((ValueError, TypeError)) as err:
        METHODS.get(name)(**{**REQUIRED.get(name, {}), option: value})
    assert f"The {option!r} parameter of method {name!r}" in str(err.value)
    received = [value, *value] if isinstance(value, list) else [value]  # a list option may name its bad entry
    assert any(repr(v) in str(err.value) for v in received), str(err.value)  # the value received


@pytest.mark.parametrize("name", ALL)
@pytest.mark.parametrize("changed", [False, True], ids=["defaults", "changed"])
def test_describe_rebuilds_equal_options(name, changed):
    method = build_method(name, **(CHANGED[name] if changed else REQUIRED.get(name, {})))
    described = method.describe()
    assert described.pop("name") == name
    assert build_method(name, **described).options == method.options


@pytest.mark.parametrize("name", ALL)
def test_no_option_is_named_like_a_run_setting(name):
    assert not set(_options(name)) & RUN_SETTINGS


_PLAIN = (int, float, bool, str, typing.Any)


def _structured_type(t) -> bool:
    """A type OmegaConf structured configs accept: a plain one, List/Dict[str, ·]/Optional of such."""
    if t in _PLAIN:
        return True
    origin, args = typing.get_origin(t), typing.get_args(t)
    if origin is list:
        return len(args) == 1 and args[0] in (int, float, str)
    if origin is dict:
        return len(args) == 2 and args[0] is str and _structured_type(args[1])
    if origin is typing.Union:  # Optional[X] is Union[X, None]
        rest = [a for a in args if a is not type(None)]
        return len(args) == 2 and len(rest) == 1 and _structured_type(rest[0])
    return False


@pytest.mark.parametrize("name", ALL)
def test_options_are_structured_configs(name):
    cls = METHODS.get(name).Options
    hints = typing.get_type_hints(cls)  # must resolve (hydra's config store reads them)
    assert set(hints) == set(_options(name))
    bad = {k: t for k, t in hints.items() if not _structured_type(t)}
    assert not bad, f"{name}: option types a structured config cannot hold: {bad}"
    for f in dataclasses.fields(cls):  # a default for every field, mutable ones through default_factory
        assert f.default is not dataclasses.MISSING or f.default_factory is not dataclasses.MISSING, f.name
    cfg = OmegaConf.structured(cls)  # what hydra does with it
    assert set(cfg) == set(_options(name))


@pytest.mark.parametrize("name", ALL)
def test_weight_and_weight_schedule_come_from_the_shared_options(name):
    options = set(_options(name))
    if "weight_schedule" in options:
        assert issubclass(METHODS.get(name).Options, WeightOptions)
