"""Grid recipes say what the cells train with: a recipe key that matches no shift fails naming it, a labelled
shift's recipe that names another optimiser replaces the inherited optimiser settings (the cell's own config.yaml
records what the user wrote), and an optimiser setting the optimiser ignores is an error naming it."""
import pytest
import yaml

from adaptkit.bench.config import override_recipes
from adaptkit.bench.grid import run_grid
from adaptkit.bench.plan import plan_grid

from .helpers import MOONS, NET, tiny


def test_a_recipe_key_matching_no_shift_fails_naming_it(tmp_path):
    with pytest.raises(ValueError, match=r"The recipe\(s\) 'moons_fourty' match no shift of the grid and no "
                                         r"registered shift; a recipe is keyed by a shift's name or label: "
                                         r"moons_40, rotated_moons\."):
        plan_grid(**tiny(tmp_path, shifts=[{**MOONS, "label": "moons_40"}],
                         recipes={"rotated_moons": NET, "moons_fourty": {"steps": 5}}))


def test_a_labelled_recipe_naming_another_optimiser_trains_with_what_it_says(tmp_path):
    # the shift's own recipe is SGD with momentum 0.5 and a cosine schedule; the label's recipe asks for Adam at
    # lr 0.002 and a small encoder: the cell must train with exactly that, inheriting none of SGD's settings
    base = {**NET, "optim": {"name": "sgd", "lr": 0.05, "momentum": 0.5, "schedule": "cosine"}}
    own = {"optim": {"name": "adam", "lr": 0.002, "betas": [0.5, 0.9]},
           "encoder": {"name": "mlp", "hidden": [8]}, "steps": 4, "batch_size": 16, "eval_every": 4}
    shift = {**MOONS, "label": "moons_adam"}
    result = run_grid(**tiny(tmp_path, methods=["source_only"], shifts=[shift], seeds=[0],
                             recipes={"rotated_moons": base, "moons_adam": own}))
    assert [r["status"] for r in result.rows] == ["ok"]
    written = yaml.safe_load((tmp_path / "cells/moons_adam/source_only/seed0/config.yaml").read_text())
    # written by hand from the recipe above and OptimSettings' documented defaults (weight_decay 0, constant)
    assert written["optim"] == {"name": "adam", "lr": 0.002, "betas": [0.5, 0.9], "weight_decay": 0.0,
                                "schedule": "constant", "momentum": 0.9}
    assert written["encoder"]["hidden"] == [8] and written["steps"] == 4


def test_an_optim_override_naming_another_optimiser_replaces_it_whole():
    shipped = {"m": {"optim": {"name": "sgd", "lr": 0.01, "momentum": 0.5}}}
    assert override_recipes(shipped, {"m": {"optim": {"name": "adam"}}}) == {"m": {"optim": {"name": "adam"}}}
    assert override_recipes(shipped, {"m": {"optim": {"lr": 0.1}}}) == {
        "m": {"optim": {"name": "sgd", "lr": 0.1, "momentum": 0.5}}}


@pytest.mark.parametrize("optim, key", [({"name": "adam", "lr": 0.01, "momentum": 0.5}, "momentum"),
                                        ({"name": "sgd", "lr": 0.01, "betas": [0.5, 0.9]}, "betas")])
def test_an_optimiser_setting_the_optimiser_ignores_is_an_error_naming_it(tmp_path, optim, key):
    with pytest.raises(ValueError, match=rf"the recipe of shift 'rotated_moons' sets optim.{key}=.*which the "
                                         rf"'{optim['name']}' optimiser ignores"):
        plan_grid(**tiny(tmp_path, shifts=[MOONS], recipes={"rotated_moons": {**NET, "optim": optim}}))
