"""The selection study: picks, regret and rank correlation on hand-made candidate tables (scipy.stats.spearmanr and
scipy.stats.t as the references), score directions, missing scores, the sweep's expansion into grid cells, and a
tiny end-to-end study (2 methods × 1 shift × 2 candidates × 2 seeds, 20 steps) that writes selection.md."""
import csv
import json
import re

import numpy as np
import pytest
from omegaconf import OmegaConf
from scipy import stats

from adaptkit.bench.grid import MethodEntry, load_config, plan_grid, run_grid_from_config
from adaptkit.bench.selection import (
    ORACLE,
    RANDOM,
    SELECTION_CSV,
    SELECTION_MD,
    Group,
    analyse,
    expand_sweep,
    judge,
    random_choice,
    run_study,
    summarise,
)
from adaptkit.config import compose
from adaptkit.select import SCORES, pick_best

ACC = [0.60, 0.90, 0.75, 0.80, 0.70]
VALUES = [0.10, 0.50, 0.30, 0.90, 0.20]


# -- one group ---------------------------------------------------------------------------------------------------
def test_a_higher_is_better_score_picks_its_maximum_and_regret_is_best_minus_picked():
    c = judge(ACC, VALUES, "snd")  # snd: higher is better
    assert c.picked == 3 == pick_best([{"snd": v} for v in VALUES], "snd")
    assert c.picked_accuracy == 0.80 and c.best_accuracy == 0.90
    assert c.regret == pytest.approx(0.10) and c.picked_best == 0.0
    assert c.spearman == pytest.approx(stats.spearmanr(VALUES, ACC)[0])  # scipy: 0.7
    assert (c.n_candidates, c.n_scored) == (5, 5)


def test_a_lower_is_better_score_picks_its_minimum_and_its_rank_correlation_is_oriented():
    c = judge(ACC, VALUES, "iwcv")  # iwcv: a risk, lower is better
    assert not SCORES["iwcv"].higher_is_better
    assert c.picked == 0 == pick_best([{"iwcv": v} for v in VALUES], "iwcv")
    assert c.regret == pytest.approx(0.90 - 0.60)
    # oriented: +1 would mean "ranks the candidates as target accuracy does"; equals ρ(−score, accuracy)
    assert c.spearman == pytest.approx(-stats.spearmanr(VALUES, ACC)[0])
    assert c.spearman == pytest.approx(stats.spearmanr(-np.asarray(VALUES), ACC)[0])


def test_a_perfect_score_has_zero_regret_and_rank_correlation_one_in_either_direction():
    up = judge(ACC, [10 * a for a in ACC], "info_max")  # higher is better and grows with accuracy
    down = judge(ACC, [1 - a for a in ACC], "dev")  # lower is better and falls with accuracy
    for c in (up, down):
        assert c.picked == 1 and c.regret == 0.0 and c.picked_best == 1.0 and c.spearman == pytest.approx(1.0)


def test_a_missing_score_never_picks_even_the_best_candidate():
    values = [0.10, None, 0.30, float("nan"), 0.20]  # the best candidate (0.90) and one NaN lack the score
    c = judge(ACC, values, "target_entropy")  # lower is better
    assert c.picked == 0 and c.n_scored == 3
    assert c.best_accuracy == 0.90 and c.regret == pytest.approx(0.30)  # best over all candidates, scored or not
    kept = [0, 2, 4]
    assert c.spearman == pytest.approx(-stats.spearmanr([values[i] for i in kept], [ACC[i] for i in kept])[0])


def test_a_group_without_the_score_reports_it_missing():
    c = judge(ACC, [None] * 5, "dev")
    assert (c.picked, c.picked_accuracy, c.regret, c.spearman, c.picked_best, c.n_scored) == (None,) * 5 + (0,)
    assert c.reason == "no candidate has a value for dev"


@pytest.mark.parametrize("values, reason", [
    ([0.4, 0.4, 0.4, 0.4, 0.4], "the score is the same for every scored candidate"),
    ([0.4, None, None, None, None], "fewer than two scored candidates"),
])
def test_rank_correlation_is_none_when_undefined(values, reason):
    c = judge(ACC, values, "snd")
    assert c.spearman is None and c.reason == reason
    assert c.picked == 0  # ties go to the earliest candidate, as in pick_best


def test_a_tie_at_the_top_goes_to_the_earliest_candidate_and_is_counted():
    c = judge([0.6, 0.9, 0.75], [1.0, 1.0, 0.5], "source_val_accuracy")  # saturated source accuracy
    assert c.picked == 0 and c.tied_at_top == 2 and c.regret == pytest.approx(0.3)
    assert c.regret_random_tie_break == pytest.approx(0.9 - (0.6 + 0.9) / 2)
    plain = judge([0.6, 0.9, 0.75], [1.0, 0.9, 0.5], "source_val_accuracy")
    assert plain.tied_at_top == 1 and plain.regret_random_tie_break == plain.regret


def test_random_pick_is_best_minus_mean_and_counts_ties_for_best():
    c = random_choice([0.9, 0.7, 0.9, 0.6])
    assert c.regret == pytest.approx(0.9 - np.mean([0.9, 0.7, 0.9, 0.6]))
    assert c.picked_best == pytest.approx(0.5) and c.spearman is None


@pytest.mark.parametrize("call, message", [
    (lambda: judge(ACC, VALUES, "entropy"), "Unknown selection score 'entropy'. Available selection scores: "
                                            "source_val_accuracy, iwcv, dev, target_entropy, info_max, snd."),
    (lambda: judge(ACC, VALUES[:3], "snd"), "judge needs one score value per candidate: got 3 values for 5"),
    (lambda: judge([0.5, 75.0], [1, 2], "snd"), "must be numbers in [0, 1]. Got 75.0"),
    (lambda: judge(ACC, ["a"] * 5, "snd"), "must be numbers or None. Got 'a'"),
    (lambda: random_choice([]), "random_choice needs at least one candidate"),
])
def test_bad_tables_are_refused_naming_the_value(call, message):
    with pytest.raises(ValueError, match=re.escape(message)):
        call()


# -- many groups -------------------------------------------------------------------------------------------------
def _group(method, shift, seed, acc, **scores):
    n = len(acc)
    return Group(method, shift, seed, tuple(f"c{i}" for i in range(n)), tuple(f"{method}[c{i}]" for i in range(n)),
                 tuple(acc), {s: tuple(v) for s, v in scores.items()})


def test_summaries_average_regret_with_a_t_interval_and_count_missing_groups():
    groups = [
        _group("dann", "moons", 0, [0.9, 0.8, 0.7], snd=[1, 3, 2], dev=[None, None, None]),
        _group("dann", "moons", 1, [0.6, 0.9, 0.8], snd=[1, 3, 2], dev=[0.5, 0.2, 0.1]),
        _group("coral", "blobs", 0, [0.5, 0.7, 0.6], snd=[3, 1, 2], dev=[0.3, 0.2, 0.1]),
    ]
    records = analyse(groups, ["snd", "dev"])
    assert len(records) == 3 * 4  # two scores + random pick + oracle per group
    by = {s.score: s for s in summarise(records, ["snd", "dev", RANDOM, ORACLE])}

    regrets = [0.9 - 0.8, 0.0, 0.7 - 0.5]  # snd picks index 1, 1, 0
    snd = by["snd"]
    assert snd.regret.mean == pytest.approx(np.mean(regrets))
    low, high = stats.t.interval(0.95, 2, loc=np.mean(regrets), scale=stats.sem(regrets))
    assert (snd.regret.low, snd.regret.high) == (pytest.approx(low), pytest.approx(high))
    rhos = [stats.spearmanr([1, 3, 2], [0.9, 0.8, 0.7])[0], stats.spearmanr([1, 3, 2], [0.6, 0.9, 0.8])[0],
            stats.spearmanr([3, 1, 2], [0.5, 0.7, 0.6])[0]]
    assert snd.spearman_mean == pytest.approx(np.mean(rhos)) and snd.n_spearman == 3
    assert snd.share_best == pytest.approx(1 / 3) and snd.n_missing == 0 and snd.n_tied == 0

    dev = by["dev"]  # lower is better: picks index 2 in both scored groups; missing in the first
    assert (dev.n_groups, dev.n_missing, dev.regret.n) == (3, 1, 2)
    assert dev.regret.mean == pytest.approx(np.mean([0.9 - 0.8, 0.7 - 0.6]))
    # regrets are rounded to 1e-6 (accuracies arrive in float32), hence abs=1e-6
    assert by[RANDOM].regret.mean == pytest.approx(np.mean([0.9 - 0.8, 0.9 - np.mean([0.6, 0.9, 0.8]), 0.1]),
                                                   abs=1e-6)
    assert by[ORACLE].regret.mean == 0.0 and by[ORACLE].share_best == 1.0
    row = next(r for r in records if r["score"] == "dev" and r["seed"] == 0)
    assert row["picked"] is None and row["regret"] is None and row["best"] == "dann[c0]"


# -- the sweep ---------------------------------------------------------------------------------------------------
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


NET = {"encoder": {"name": "mlp", "hidden": [16], "features": 8}, "head": {"name": "mlp", "hidden": [16]},
       "optim": {"name": "adam", "lr": 0.01}, "steps": 20, "batch_size": 16, "eval_every": 20}
MOONS = {"name": "rotated_moons", "params": {"n_source": 60, "n_target": 60}}


def study_settings(out_dir, **kw):
    s = dict(methods=["coral", "dann"], shifts=[MOONS], seeds=[0, 1], recipes={"rotated_moons": NET},
             sweep={"weight": [0.3, 3.0]}, scores=list(SCORES), out_dir=str(out_dir), workers=2, verbose=False)
    s.update(kw)
    return s


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
    cfg = compose(["bench=selection"], config_name="bench")
    assert list(cfg.scores) == list(SCORES)  # every score is recorded
    plan = plan_grid(cfg)
    per_method = {b: sum(k.base == b for k in plan.candidates) for b in dict.fromkeys(k.base for k in plan.candidates)}
    assert per_method == {"dann": 9, "confusion": 9, "coral": 9, "mmd": 9, "adda": 9, "adr": 9}
    assert {k.method.options.get("weight") for k in plan.candidates if k.base == "dann"} == {0.1, 1.0, 3.0}
    assert len(plan.cells) == 54 * 4 * 2


# -- end to end --------------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def study(tmp_path_factory):
    return run_study(None, **study_settings(tmp_path_factory.mktemp("study")), command="pytest")


def test_a_tiny_study_records_every_score_at_the_final_evaluation(study):
    out = study.grid.out_dir
    assert study.grid.counts == {"ok": 8} and len(study.groups) == 4
    summary = json.loads((out / "cells/rotated_moons/dann__weight3.0/seed1/summary.json").read_text())
    assert summary["final"]["step"] == 20
    for s in SCORES:
        assert summary["final"][f"score/{s}"] is not None
    assert not (out / "report.md").exists() and (out / "results.csv").exists()


def test_a_tiny_study_writes_selection_md_and_csv_with_every_score(study):
    out = study.grid.out_dir
    text = (out / SELECTION_MD).read_text(encoding="utf-8")
    assert "No label-free score replaces a labelled target sample" in text
    for part in ("## All groups", "## Per shift", "## Per method", "## What this study does not show",
                 "**Toy data.**", "**Small sweeps.**", "**dann** (2 candidates): weight ∈ {0.3, 3.0}",
                 "Command: `pytest`", "labelled target test samples"):
        assert part in text
    for name in list(SCORES) + [RANDOM, ORACLE]:
        assert re.search(rf"^\| {re.escape(name)} \| .* \| 4 \| ", text, re.M), name  # a row over the 4 groups
    rows = list(csv.DictReader(open(out / SELECTION_CSV, encoding="utf-8")))
    assert len(rows) == 4 * (len(SCORES) + 2)
    for r in rows:
        regret = float(r["regret"])
        assert regret == pytest.approx(float(r["best_accuracy"]) - float(r["picked_accuracy"]), abs=1e-6)
        assert 0.0 <= regret <= 1.0
    assert all(float(r["regret"]) == 0.0 for r in rows if r["score"] == ORACLE)
    by_score = {s.score: s for s in study.summaries}
    assert set(by_score) == set(SCORES) | {RANDOM, ORACLE}
    assert by_score["dev"].regret.mean == pytest.approx(np.mean([float(r["regret"]) for r in rows
                                                                 if r["score"] == "dev"]))


def test_the_bench_app_runs_a_study_for_a_config_with_a_sweep_and_resumes(study, capsys):
    cfg = OmegaConf.create(load_config(None, study_settings(study.grid.out_dir)))
    again = run_grid_from_config(cfg)  # what `adaptkit-bench bench=selection` calls
    assert (again.grid.ran, again.grid.reused) == (0, 8)
    assert [s.regret.mean for s in again.summaries] == [s.regret.mean for s in study.summaries]
    printed = capsys.readouterr().out
    assert "regret pp ± 95% CI" in printed and "selection:" in printed
    assert "No label-free score replaces a labelled target sample" in printed


def test_a_study_without_a_choice_is_refused(tmp_path):
    with pytest.raises(ValueError, match=re.escape("A selection study needs a sweep")):
        run_study(None, **study_settings(tmp_path, sweep={}))
    with pytest.raises(ValueError, match=re.escape("gives every method a single candidate")):
        run_study(None, **study_settings(tmp_path, methods=["source_only"], sweep={"weight": [1.0]}))
    assert not (tmp_path / "cells").exists()
