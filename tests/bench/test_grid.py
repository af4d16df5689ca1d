"""The benchmark grid runner: expansion, resume, fault isolation, the report of a tiny grid, the shipped bench
configs, and a user's loss joining the grid through one override. Grids here are 2-3 methods × 1-2 small shifts ×
2 seeds with 20 steps, so the whole file runs in well under a minute on two cores."""
import csv
import json
import re
from pathlib import Path

import pytest
import torch

from adaptkit.bench.grid import (
    CELL_SPEC,
    FAILURE,
    BenchConfig,
    execute,
    load_config,
    plan_grid,
    run_grid,
)
from adaptkit.bench.report import SAFETY_NOTE, read_results_csv
from adaptkit.config import CONFIG_DIR, compose
from adaptkit.methods import Alignment, Stage, Update

ROOT = Path(__file__).resolve().parents[2]
NET = {"encoder": {"name": "mlp", "hidden": [16], "features": 8}, "head": {"name": "mlp", "hidden": [16]},
       "optim": {"name": "adam", "lr": 0.01}, "steps": 20, "batch_size": 16, "eval_every": 10}
MOONS = {"name": "rotated_moons", "params": {"n_source": 60, "n_target": 60}}
BLOBS = {"name": "shifted_blobs", "params": {"n_source": 60, "n_target": 60, "n_features": 3}}


def tiny(out_dir, **kw):
    """Bench overrides for a 2 methods × 2 shifts × 2 seeds grid of 20-step cells."""
    settings = dict(methods=["source_only", "coral"], shifts=[MOONS, BLOBS], seeds=[0, 1],
                    recipes={"rotated_moons": NET, "shifted_blobs": NET}, out_dir=str(out_dir), workers=1,
                    verbose=False)
    settings.update(kw)
    return settings


def numbers(rows):
    """Result rows without the one column that legitimately differs between runs: wall seconds."""
    return [{k: v for k, v in r.items() if k != "wall_seconds"} for r in rows]


# -- methods importable by path from this module, for the fault-isolation test ----------------------------------
class FailsOnTwoInputs(Alignment):
    """Source-only training that refuses 2-D inputs in setup: fails on the moons, trains on 3-D blobs."""

    name = "fails_on_two_inputs"

    def setup(self, model, info):
        if info.input_shape == (2,):
            raise ValueError("FailsOnTwoInputs refuses 2-D inputs")

    def stages(self):
        return [Stage("train", [Update("classify", [self.model.encoder, self.model.head], self.source_loss)])]


def nan_loss(source_features, target_features):
    """A user's loss that returns NaN: the loop raises DivergenceError."""
    return (source_features.mean() - target_features.mean()) * float("nan")


# -- a finished tiny grid, shared by the report and resume tests -------------------------------------------------
@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """The tiny grid run without interruption, with two worker processes, recording one selection score."""
    out = tmp_path_factory.mktemp("grid")
    return run_grid(**tiny(out, workers=2, scores=["target_entropy"]))


def test_grid_expands_methods_shifts_seeds_with_one_recipe_per_shift(tmp_path):
    plan = plan_grid(**tiny(tmp_path, methods=[
        "source_only", {"name": "mmd", "label": "mmd_linear", "options": {"estimator": "linear"}},
        "tests.bench.test_grid.nan_loss"]))
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
    assert plan.recipes["rotated_moons"]["encoder"] == NET["encoder"]  # replaced whole, not merged with the shipped
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


def test_resume_after_an_interruption_gives_the_uninterrupted_results(tmp_path, finished):
    settings = tiny(tmp_path, scores=["target_entropy"])
    first = run_grid(**settings, max_cells=3)
    assert (first.ran, first.pending, first.complete) == (3, 5, False)
    assert len(read_results_csv(tmp_path / "results.csv")) == 3  # what is done so far

    second = run_grid(**settings)
    assert (second.ran, second.reused, second.pending) == (5, 3, 0)
    resumed, whole = read_results_csv(tmp_path / "results.csv"), read_results_csv(finished.results_csv)
    assert len(resumed) == 8 and all(r["status"] == "ok" for r in resumed)
    assert numbers(resumed) == numbers(whole)  # one worker in-process == two worker processes, to the bit
    assert all(r["score/target_entropy"] is not None for r in resumed)

    third = run_grid(**settings)  # nothing left: every cell reused, results rebuilt identically
    assert (third.ran, third.reused) == (0, 8)
    assert numbers(read_results_csv(tmp_path / "results.csv")) == numbers(resumed)


def test_a_finished_grid_with_other_settings_is_refused(tmp_path, finished):
    with pytest.raises(ValueError, match=re.escape("were written with other settings than this grid's")):
        run_grid(**tiny(finished.out_dir, scores=["target_entropy"], recipes={"rotated_moons": {**NET, "steps": 30},
                                                                              "shifted_blobs": NET}))


def test_a_failing_cell_is_recorded_and_the_grid_goes_on(tmp_path):
    methods = ["source_only", "tests.bench.test_grid.FailsOnTwoInputs", "tests.bench.test_grid.nan_loss"]
    result = run_grid(**tiny(tmp_path, methods=methods))
    status = {(r["method"], r["shift"], r["seed"]): r for r in result.rows}
    assert len(status) == 12
    for seed in (0, 1):
        assert status[("source_only", "rotated_moons", seed)]["status"] == "ok"
        assert status[("FailsOnTwoInputs", "shifted_blobs", seed)]["status"] == "ok"
        failed = status[("FailsOnTwoInputs", "rotated_moons", seed)]
        assert failed["status"] == "failed"
        assert failed["error"] == "ValueError: FailsOnTwoInputs refuses 2-D inputs"
        assert failed["target_accuracy"] is None
        diverged = status[("nan_loss", "shifted_blobs", seed)]
        assert diverged["status"] == "diverged" and diverged["error"].startswith("DivergenceError: ")
    record = json.loads((tmp_path / "cells/rotated_moons/FailsOnTwoInputs/seed0" / FAILURE).read_text())
    assert record["status"] == "failed" and "Traceback" in record["traceback"]
    assert result.counts == {"ok": 6, "failed": 2, "diverged": 4}

    report = result.report.read_text(encoding="utf-8")
    assert re.search(r"rotated_moons / FailsOnTwoInputs / seed 0: \*\*failed\*\* — "
                     r"`ValueError: FailsOnTwoInputs refuses 2-D inputs`", report)
    assert "shifted_blobs / nan_loss / seed 1: **diverged**" in report
    assert "2 diverged" in report  # the excluded column

    again = run_grid(**tiny(tmp_path, methods=methods, retry_failed=False))
    assert (again.ran, again.reused) == (0, 12)  # failures kept, not retried
    retried = run_grid(**tiny(tmp_path, methods=methods))
    assert retried.ran == 6 and retried.counts == result.counts  # failures retried by default, same outcome


def test_report_and_results_of_a_tiny_grid(finished):
    out = finished.out_dir
    header = next(csv.reader(open(out / "results.csv", encoding="utf-8")))
    assert header == ["method", "shift", "seed", "status", "target_accuracy", "source_val_accuracy", "steps",
                      "wall_seconds", "error", "score/target_entropy"]
    rows = read_results_csv(out / "results.csv")
    assert rows == finished.rows and len(rows) == 8
    assert all(r["status"] == "ok" and r["steps"] == 20 and r["wall_seconds"] > 0 for r in rows)
    summary = json.loads((out / "cells/shifted_blobs/coral/seed1/summary.json").read_text())
    row = next(r for r in rows if (r["method"], r["shift"], r["seed"]) == ("coral", "shifted_blobs", 1))
    assert row["target_accuracy"] == summary["target_accuracy"]
    assert row["source_val_accuracy"] == summary["source_val_accuracy"]
    assert row["score/target_entropy"] == summary["final"]["score/target_entropy"]
    assert json.loads((out / "cells/shifted_blobs/coral/seed1" / CELL_SPEC).read_text())["seed"] == 1

    text = finished.report.read_text(encoding="utf-8")
    assert SAFETY_NOTE in text
    for name in ("## Shift: rotated_moons", "## Shift: shifted_blobs", "| source_only |", "| coral |",
                 "coral − source_only", "## Average rank across shifts", "None: every run finished",
                 "## Recipes (shared by every method on a shift)", "20 steps, batch size 16"):
        assert name in text
    for png in ("accuracy_rotated_moons.png", "curves_rotated_moons.png", "curves_shifted_blobs.png"):
        assert (out / png).read_bytes()[:4] == b"\x89PNG" and f"]({png})" in text
    table = finished.table()
    assert table.splitlines()[0].split() == ["target", "acc.", "%", "rotated_moons", "shifted_blobs"]
    assert [line.split()[0] for line in table.splitlines()[2:]] == ["source_only", "coral"]


BENCH_GRIDS = sorted(p.stem for p in (CONFIG_DIR / "bench").glob("*.yaml"))


def test_bench_yaml_composes_to_the_demo_grid():
    cfg = compose(config_name="bench")
    assert cfg.name == "demo"
    assert list(cfg.methods) == ["source_only", "dann", "confusion", "adda", "adr", "coral", "mmd", "target_oracle"]
    assert sorted(cfg.shifts) == ["corrupted_digits", "rotated_moons", "selection_bias", "shifted_blobs"]
    assert list(cfg.seeds) == [0, 1, 2] and cfg.out_dir == "runs/bench/demo"
    assert {r.head.name for r in cfg.recipes.values()} == {"mlp"} and all(r.head.dropout > 0 for r in cfg.recipes.values())
    plan = plan_grid(cfg)
    assert len(plan.cells) == 8 * 4 * 3 and plan.reference == "dann"


@pytest.mark.parametrize("grid", BENCH_GRIDS)
def test_every_named_grid_composes_and_plans(grid):
    assert {"demo", "tiny"} <= set(BENCH_GRIDS)
    cfg = compose([f"bench={grid}"], config_name="bench")
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
        compose([override], config_name="bench")


def test_load_config_defaults_match_the_schema():
    c = load_config("tiny", {"workers": 1})
    assert set(c) == set(BenchConfig.__dataclass_fields__)
    assert c["name"] == "tiny" and c["workers"] == 1 and c["out_dir"] == "runs/bench/tiny"


def test_a_users_loss_joins_the_grid_with_one_override(tmp_path, monkeypatch):
    monkeypatch.chdir(ROOT)  # 'examples.my_alignment' is found from the repository root, as on the command line
    cfg = compose(["bench=tiny", "add_method=examples.my_alignment.energy_distance",  # the one override
                   f"out_dir={tmp_path}", "workers=1", "verbose=false", "recipes.rotated_moons.steps=20",
                   "recipes.shifted_blobs.steps=20"], config_name="bench")
    result = execute(plan_grid(cfg))
    mine = [r for r in result.rows if r["method"] == "energy_distance"]
    assert len(mine) == 4 and all(r["status"] == "ok" for r in mine)
    assert result.plan.reference == "energy_distance"  # the added method is what the others are compared with
    text = result.report.read_text(encoding="utf-8")
    assert "| energy_distance |" in text and "energy_distance − source_only" in text
    assert "coral − energy_distance" in text
    assert "energy_distance" in result.table()
    config = (tmp_path / "cells/rotated_moons/energy_distance/seed0/config.yaml").read_text()
    assert "feature_loss" in config and "energy_distance" in config


def test_energy_distance_is_zero_on_equal_batches_and_positive_apart():
    from examples.my_alignment import energy_distance, mean_gap

    x = torch.randn(32, 4, generator=torch.Generator().manual_seed(0))
    assert float(energy_distance(x, x)) < 1e-3
    assert float(energy_distance(x, x + 3.0)) > 1.0 and float(mean_gap(x, x + 3.0)) == pytest.approx(36.0, rel=1e-5)
