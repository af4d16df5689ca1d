"""The bench settings: the shipped bench and study configs compose and plan, typos fail at composition, and
overrides merge as documented."""
import re

import pytest

from adaptkit.bench.config import BenchConfig, compose_bench, load_config, override_recipes
from adaptkit.bench.plan import plan_grid
from adaptkit.config import CONFIG_DIR

BENCH_GRIDS = sorted(p.stem for p in (CONFIG_DIR / "bench").glob("*.yaml"))


def test_bench_yaml_composes_to_the_demo_grid():
    cfg = compose_bench()
    assert cfg.name == "demo"
    labels = [m if isinstance(m, str) else m["label"] for m in cfg.methods]
    assert labels == ["source_only", "dann", "confusion", "adda", "adr", "coral", "mmd", "cdan", "cdan_e", "mcd",
                      "self_training", "target_oracle"]
    cdan_e = cfg.methods[8]
    assert cdan_e["name"] == "cdan" and dict(cdan_e["options"]) == {"entropy_weighting": True}  # CDAN+E
    assert sorted(cfg.shifts) == ["corrupted_digits", "rotated_moons", "selection_bias", "shifted_blobs"]
    assert list(cfg.seeds) == [0, 1, 2] and cfg.out_dir == "runs/bench/demo"
    assert {r.head.name for r in cfg.recipes.values()} == {"mlp"} and all(r.head.dropout > 0 for r in cfg.recipes.values())
    plan = plan_grid(cfg)
    assert len(plan.cells) == 12 * 4 * 3 and plan.reference == "dann"
    assert {c.method.label: c.method.options for c in plan.cells}["cdan_e"] == {"entropy_weighting": True}


def test_study_yaml_composes_to_the_shipped_selection_study():
    cfg = compose_bench(config_name="study")
    assert cfg.name == "selection" and cfg.out_dir == "runs/bench/selection"
    assert compose_bench(["bench=selection"]) == cfg  # the study command's default is the named grid `selection`
    assert not compose_bench(["bench=tiny"], config_name="study").sweep  # another grid can be named (then refused)


@pytest.mark.parametrize("grid", BENCH_GRIDS)
def test_every_named_grid_composes_and_plans(grid):
    assert {"demo", "tiny"} <= set(BENCH_GRIDS)
    cfg = compose_bench([f"bench={grid}"])
    assert cfg.name == grid
    plan_grid(cfg)  # every method, shift, recipe and network option of the grid is valid


@pytest.mark.parametrize("override, message", [
    ("seedz=[1]", "Could not override 'seedz'"),
    ("recipes.rotated_moons.stepz=3", "Could not override 'recipes.rotated_moons.stepz'"),
    ("workers=many", "workers"),
    ("bench=tinyy", "Available options in 'bench'"),
])
def test_typos_fail_at_composition(override, message):
    with pytest.raises(Exception, match=re.escape(message)):
        compose_bench([override])


def test_load_config_defaults_match_the_schema():
    c = load_config("tiny", {"workers": 1})
    assert set(c) == set(BenchConfig.__dataclass_fields__)
    assert c["name"] == "tiny" and c["workers"] == 1 and c["out_dir"] == "runs/bench/tiny"


def test_a_recipe_override_replaces_a_network_whole_and_merges_the_optimiser():
    current = {"moons": {"encoder": {"name": "mlp", "hidden": [64]}, "optim": {"name": "sgd", "lr": 0.1},
                         "steps": 10}}
    out = override_recipes(current, {"moons": {"encoder": {"name": "cnn"}, "optim": {"lr": 0.01}},
                                     "blobs": {"steps": 5}})
    assert out["moons"] == {"encoder": {"name": "cnn"}, "optim": {"name": "sgd", "lr": 0.01}, "steps": 10}
    assert out["blobs"] == {"steps": 5} and current["moons"]["optim"]["lr"] == 0.1  # the input is left alone
    with pytest.raises(TypeError, match=re.escape("The recipe override of shift 'moons' must be a mapping")):
        override_recipes(current, {"moons": 3})
