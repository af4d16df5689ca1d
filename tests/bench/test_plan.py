"""The plan of a grid: methods × shifts × seeds expanded with one recipe per shift, every bad setting refused
before anything trains, and a sweep expanded into candidates (the options each method has, and the learning rate)."""
import re
from pathlib import Path

import pytest

from adaptkit.config import typed_component

from adaptkit.bench.config import compose_bench
from adaptkit.bench.plan import MethodEntry, expand_sweep, plan_grid

from .helpers import MOONS, NET, study_settings, tiny


def test_grid_expands_methods_shifts_seeds_with_one_recipe_per_shift(tmp_path):
    plan = plan_grid(**tiny(tmp_path, methods=[
        "source_only", {"name": "mmd", "label": "mmd_linear", "options": {"estimator": "linear"}},
        "tests.bench.helpers.nan_loss"]))
    assert [m.label for m in plan.methods] == ["source_only", "mmd_linear", "nan_loss"]
    assert plan.methods[1].options == {"estimator": "linear"}
    assert len(plan.cells) == 3 * 2 * 2
    assert [c.name() for c in plan.cells[:3]] == ["rotated_moons/source_only/seed0", "rotated_moons/source_only/seed1",
                                                  "rotated_moons/mmd_linear/seed0"]
    assert plan.cells[0].relpath == Path("cells/rotated_moons/source_only/seed0")
    for shift in plan.shifts:  # fairness: every method on a shift trains with the same recipe and seeds
        cells = [c for c in plan.cells if c.shift == shift]
        assert all(c.recipe == plan.recipes[shift.label] for c in cells)
        assert {(c.method.label, c.seed) for c in cells} == {(m.label, s) for m in plan.methods for s in (0, 1)}
    assert plan.recipes["rotated_moons"]["steps"] == 20
    # replaced whole, not merged with the shipped encoder: NET's options, the rest at the encoder's own defaults
    assert plan.recipes["rotated_moons"]["encoder"] == typed_component("encoder", NET["encoder"])
    assert plan.recipes["rotated_moons"]["optim"]["name"] == "adam"
    assert (plan.baseline, plan.oracle, plan.reference) == ("source_only", "target_oracle", "mmd_linear")


def test_a_labelled_shift_uses_its_own_recipe_before_its_name(tmp_path):
    moons_45 = {"name": "rotated_moons", "label": "moons_45", "params": {**MOONS["params"], "angle": 45}}
    plan = plan_grid(**tiny(tmp_path, shifts=[MOONS, moons_45],
                            recipes={"rotated_moons": NET, "moons_45": {**NET, "steps": 30}}))
    assert plan.recipes == {"rotated_moons": plan.recipes["rotated_moons"], "moons_45": plan.recipes["moons_45"]}
    assert (plan.recipes["rotated_moons"]["steps"], plan.recipes["moons_45"]["steps"]) == (20, 30)


@pytest.mark.parametrize("change, message", [
    ({"methods": ["source_only", "danm"]}, "Unknown method 'danm'. Available methods: adda, adr"),
    ({"methods": ["source_only", {"name": "coral", "opts": {}}]},
     "Unknown key 'opts' in methods[1]. Accepted keys: name, label, options."),
    ({"methods": ["source_only", {"name": "coral", "options": {"wieght": 2}}]}, "Unknown option 'wieght'"),
    ({"methods": ["coral", {"name": "coral", "options": {"weight": 2.0}}]}, "Two methods have the label 'coral'"),
    ({"methods": [{"name": "coral", "label": "a/b"}]}, "Got 'a/b' instead"),
    ({"shifts": ["rotated_moonz"]}, "Unknown shift 'rotated_moonz'. Available shifts:"),
    ({"shifts": [{"name": "rotated_moons", "params": {"angel": 3}}]},
     "Unknown parameter 'angel' for shift 'rotated_moons'"),
    ({"reference": "dann"}, "The 'reference' parameter of the bench config must be one of {'source_only', 'coral'}"),
    ({"recipes": {"rotated_moons": {**NET, "steps": 0}}}, "The 'steps' parameter of the recipe of shift"),
    ({"recipes": {"rotated_moons": {**NET, "head": {"name": "mlp", "droput": 0.5}}}}, "Unknown option 'droput'"),
    ({"scores": ["entropy"]}, "The 'scores' parameter of the bench config must be one of"),
    ({"workers": 0}, "The 'workers' parameter of the bench config must be in the range [1, inf)"),
    ({"seedz": [1]}, "Key 'seedz' not in 'BenchConfig'"),
])
def test_bad_settings_fail_before_any_training_naming_the_value(tmp_path, change, message):
    with pytest.raises((ValueError, TypeError), match=re.escape(message)):
        plan_grid(**tiny(tmp_path, **change))
    assert not tmp_path.joinpath("cells").exists()


def test_a_shift_without_a_recipe_is_refused():
    bare = {"methods": ["source_only"], "shifts": ["rotated_moons", "selection_bias"],
            "recipes": {"rotated_moons": NET}}  # a plain mapping: the shipped recipes are not loaded
    with pytest.raises(ValueError, match=re.escape("No recipe for shift 'selection_bias': add recipes.selection_bias "
                                                   "(encoder, head, optim, steps, batch_size) to the bench config. "
                                                   "Recipes given for: rotated_moons.")):
        plan_grid(bare)


# -- the sweep -------------------------------------------------------------------------------------------------
def test_the_sweep_expands_the_options_each_method_has_and_the_learning_rate():
    methods = [MethodEntry("coral", "coral", {}), MethodEntry("adda", "adda", {}),
               MethodEntry("source_only", "source_only", {})]
    ks = expand_sweep(methods, {"weight": [0.3, 3.0], "adapt_lr": [0.0002], "lr": [0.001, 0.003]})
    assert [k.label for k in ks] == [
        "coral__weight0.3__lr0.001", "coral__weight0.3__lr0.003", "coral__weight3.0__lr0.001",
        "coral__weight3.0__lr0.003", "adda__adapt_lr0.0002__lr0.001", "adda__adapt_lr0.0002__lr0.003",
        "source_only__lr0.001", "source_only__lr0.003"]
    assert ks[2].display() == "coral[weight=3.0, lr=0.001]" and ks[2].base == "coral"
    assert ks[2].method.options == {"weight": 3.0} and ks[2].recipe == {"optim": {"lr": 0.001}}
    assert ks[4].method.options == {"adapt_lr": 0.0002}  # adda has no weight: not swept there
    only = expand_sweep(methods, {"weight": [0.3, 3.0]})
    assert [k.label for k in only][-2:] == ["adda", "source_only"] and only[-1].recipe == {}


@pytest.mark.parametrize("methods, sweep, message", [
    (["coral"], {"wieght": [1.0]}, "The sweep key 'wieght' is neither 'lr' (the recipe's learning rate) nor an "
                                   "option of a method. Options of the grid's methods — coral: weight, weight_schedule."),
    (["coral"], {"lr": [0.001, 0.0]}, "must list learning rates in (0, inf). Got 0.0"),
    (["coral"], {"weight": []}, "The 'weight' entry of the bench config's sweep must be a non-empty list"),
    (["coral"], {"weight": 0.3}, "must be a non-empty list of values, e.g. weight: [0.3, 1.0]. Got 0.3 instead."),
    (["coral"], {"weight": [1.0, 1.0]}, "must list distinct values. Got [1.0, 1.0]."),
    (["coral"], {"weight": [1, 1.0]}, "must list distinct values. Got [1, 1.0]."),
    (["coral"], {"weight": ["a/b"]}, "lists 'a/b'; a swept string must be folder-safe"),
])
def test_bad_sweeps_are_refused_naming_the_value(methods, sweep, message):
    with pytest.raises(ValueError, match=re.escape(message)):
        expand_sweep([MethodEntry(m, m, {}) for m in methods], sweep)


def test_a_swept_option_also_set_in_the_entry_is_refused():
    with pytest.raises(ValueError, match=re.escape("Method 'coral' sets 'weight' in its options and the sweep")):
        expand_sweep([MethodEntry("coral", "coral", {"weight": 2.0})], {"weight": [0.3]})


def test_a_swept_learning_rate_changes_only_that_in_the_cells_recipe(tmp_path):
    plan = plan_grid(**study_settings(tmp_path, sweep={"lr": [0.001, 0.03]}))
    assert [m.label for m in plan.methods] == ["coral__lr0.001", "coral__lr0.03", "dann__lr0.001", "dann__lr0.03"]
    assert len(plan.cells) == 4 * 2
    for c in plan.cells:
        lr = float(c.method.label.rpartition("__lr")[2])
        assert c.recipe["optim"]["lr"] == lr
        assert {k: v for k, v in c.recipe.items() if k != "optim"} == \
            {k: v for k, v in plan.recipes["rotated_moons"].items() if k != "optim"}
    assert plan.recipes["rotated_moons"]["optim"]["lr"] == 0.01  # the shift's own recipe is untouched
    plain = plan_grid(**study_settings(tmp_path, sweep={}))
    assert plain.method_recipes == {} and plain.candidates == []
    assert all(c.recipe == plain.recipes["rotated_moons"] for c in plain.cells)


def test_the_shipped_study_composes_and_plans_every_candidate():
    cfg = compose_bench(["bench=selection"])
    assert list(cfg.scores) == []  # empty: run_study records every score of SCORES (reverse_validation included)
    plan = plan_grid(cfg)
    per_method = {b: sum(k.base == b for k in plan.candidates) for b in dict.fromkeys(k.base for k in plan.candidates)}
    assert per_method == {"dann": 9, "confusion": 9, "coral": 9, "mmd": 9, "adda": 9, "adr": 9}
    assert {k.method.options.get("weight") for k in plan.candidates if k.base == "dann"} == {0.1, 1.0, 3.0}
    assert len(plan.cells) == 54 * 4 * 2
