"""Benchmark report and results CSV, on a tiny hand-made grid: 2 shifts x 3 methods x 3 seeds, one failed cell."""
import csv
import math
import os
import re

import pytest
import scipy.stats

from adaptkit.bench.report import (
    RESULT_COLUMNS,
    check_rows,
    read_results_csv,
    write_report,
    write_results_csv,
)
from adaptkit.safety import REPORT_NOTE

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # reference: the PNG signature, PNG specification (ISO/IEC 15948) section 5.2
FAILED_ERROR = "RuntimeError: loss became NaN at step 40 | lr=3e-2"


def make_rows():
    accs = {
        "source_only": [0.70, 0.72, 0.71],
        "dann": [0.78, 0.80, 0.74],
        "target_oracle": [0.95, 0.96, 0.94],
    }
    rows = []
    for shift, offset in (("rotated_moons", 0.0), ("shifted_blobs", -0.05)):
        for method, values in accs.items():
            for seed, acc in enumerate(values):
                rows.append({
                    "method": method, "shift": shift, "seed": seed, "status": "ok",
                    "target_accuracy": acc + offset, "source_val_accuracy": 0.97, "steps": 200,
                    "wall_seconds": 1.25, "error": None, "entropy": 0.3 + seed / 10,
                })
    failed = next(r for r in rows if (r["method"], r["shift"], r["seed"]) == ("dann", "shifted_blobs", 1))
    failed.update(status="failed", target_accuracy=None, steps=None, error=FAILED_ERROR)
    return rows


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    out = tmp_path_factory.mktemp("report")
    curves = {("dann", "rotated_moons", s): [(0, 0.5), (100, 0.7), (200, 0.78)] for s in range(3)}
    curves[("source_only", "rotated_moons", 0)] = [(0, 0.5), (100, 0.68), (200, 0.70)]
    path = write_report(make_rows(), out, curves=curves)
    return path, path.read_text(encoding="utf-8")


def test_report_states_the_warning_near_the_top(report):
    path, text = report
    assert path.name == "report.md"
    assert REPORT_NOTE in text
    assert "can make a model worse than source-only" in text
    assert "target labels" in text and "real deployments do not have" in text
    assert "labelled target sample" in text and "rules of your field" in text
    assert text.index(REPORT_NOTE) < text.index("## Shift:")


def test_report_names_every_method_shift_and_failure(report):
    _, text = report
    for name in ("source_only", "dann", "target_oracle", "rotated_moons", "shifted_blobs"):
        assert name in text
    assert FAILED_ERROR in text
    assert re.search(r"shifted_blobs / dann / seed 1: \*\*failed\*\*", text)
    assert "1 failed" in text  # the excluded column of the failed cell


def test_report_numbers(report):
    _, text = report
    # by hand: source_only on rotated_moons is 71.0 %, t_{0.975,2} * 1 / sqrt(3) = 2.48 -> "71.0 ± 2.5"
    assert "| source_only | 71.0 ± 2.5 | 3 |" in text
    # by hand: dann gap closed on rotated_moons = (77.33 - 71) / (95 - 71) = 26 %
    assert re.search(r"\| dann \| [^|]+ \| 3 \| – \| 26% \|", text)
    # the failed seed leaves dann with 2 seeds on shifted_blobs
    assert re.search(r"\| dann \| [^|]+ \| 2 \| 1 failed \|", text)
    for section in ("### Paired comparisons on rotated_moons", "## Average rank across shifts",
                    "## Failed and diverged runs", "dann − source_only", "target_oracle − dann",
                    "paired t-test p", "Wilcoxon signed-rank p"):
        assert section in text
    # ranks: dann beats source_only on both shifts; the oracle is not ranked
    assert "| dann | 1.00 | 1 | 1 |" in text and "| source_only | 2.00 | 2 | 2 |" in text


def test_report_writes_valid_pngs(report):
    path, text = report
    pngs = sorted(p.name for p in path.parent.glob("*.png"))
    assert pngs == ["accuracy_rotated_moons.png", "accuracy_shifted_blobs.png", "curves_rotated_moons.png"]
    for name in pngs:
        data = (path.parent / name).read_bytes()
        assert data[:8] == PNG_MAGIC and len(data) > 1000
        assert f"]({name})" in text
    assert not list(path.parent.glob("*.tmp"))  # atomic writes leave no temporary files


def test_two_seeds_print_their_range_not_a_t_interval(report):
    _, text = report
    # dann on shifted_blobs kept seeds 0 and 2 (seed 1 failed): 73 % and 69 %. A 95% t-interval would be
    # 71 ± 12.706 * 2 = 71 ± 25 (scipy.stats.t.ppf(0.975, 1) = 12.706); the report gives the range instead
    assert scipy.stats.t.ppf(0.975, 1) * 2 > 25
    assert "| dann | 71.0 (range 69.0–73.0, 2 seeds) | 2 |" in text
    assert "with two seeds the table gives the mean and the range" in text
    assert "| dann | 77 ± 8 | 3 |" in text  # three seeds keep their interval: mean 77.3, t_{.975,2} * s / sqrt(3) = 7.6


def test_report_single_seed_and_missing_names(tmp_path):
    rows = [
        {"method": "mmd", "shift": "s", "seed": 0, "status": "ok", "target_accuracy": 0.8,
         "source_val_accuracy": None, "steps": 10, "wall_seconds": None, "error": None},
        {"method": "mmd", "shift": "s", "seed": 1, "status": "diverged", "target_accuracy": float("nan"),
         "source_val_accuracy": None, "steps": 10, "wall_seconds": None, "error": None},
        {"method": "coral", "shift": "s", "seed": 0, "status": "ok", "target_accuracy": None,
         "source_val_accuracy": None, "steps": 10, "wall_seconds": None, "error": None},
    ]
    text = write_report(rows, tmp_path).read_text(encoding="utf-8")
    assert "80.00 ± n/a" in text  # one seed: no interval, no crash
    assert "1 missing accuracy" in text and "1 diverged" in text
    assert "(no error message recorded)" in text
    assert "`source_only` has no runs on this shift" in text and "`dann` has no runs on this shift" in text
    assert "No shift has a mean for every ranked method" in text
    assert REPORT_NOTE in text


def test_report_with_no_failures_and_error_with_backticks(tmp_path):
    rows = [r for r in make_rows() if r["status"] == "ok"]
    text = write_report(rows, tmp_path).read_text(encoding="utf-8")
    assert "None: every run finished with status `ok`." in text
    rows[0].update(status="failed", error="bad `x`\nsecond line")
    text = write_report(rows, tmp_path).read_text(encoding="utf-8")
    assert "``bad `x` second line``" in text  # one code span, line break folded


# -------------------------------------------------------------------------------------------------------- CSV


def test_csv_round_trip(tmp_path):
    rows = make_rows()
    rows[0]["wall_seconds"] = 0.1 + 0.2  # a float whose repr needs all 17 digits
    rows[1]["target_accuracy"] = float("nan")
    rows[2]["selection_score"] = -1.5    # a score column present in one row only
    path = write_results_csv(rows, tmp_path / "sub" / "results.csv")
    back = read_results_csv(path)
    # reference: the csv module reads back the fixed column order, then the score columns sorted
    with open(path, newline="", encoding="utf-8") as f:
        header = next(csv.reader(f))
    assert header == list(RESULT_COLUMNS) + ["entropy", "selection_score"]
    assert math.isnan(back[1]["target_accuracy"])
    back[1]["target_accuracy"] = rows[1]["target_accuracy"] = None
    for r in rows:
        r.setdefault("selection_score", None)
    assert back == rows
    assert back[0]["wall_seconds"] == 0.1 + 0.2
    assert isinstance(back[0]["seed"], int) and back[5]["error"] is None
    assert next(r for r in back if r["status"] == "failed")["error"] == FAILED_ERROR
    assert not list(path.parent.glob("*.tmp"))


def test_csv_write_is_atomic_on_failure(tmp_path):
    path = write_results_csv(make_rows(), tmp_path / "results.csv")
    before = path.read_bytes()
    bad = make_rows() + [dict(make_rows()[0], seed=99, status="crashed")]
    with pytest.raises(ValueError):
        write_results_csv(bad, path)
    assert path.read_bytes() == before and not list(tmp_path.glob("*.tmp"))


def test_read_csv_errors(tmp_path):
    p = tmp_path / "bad.csv"
    p.write_text("method,shift\nx,y\n", encoding="utf-8")
    with pytest.raises(ValueError, match=re.escape("lacks the columns 'seed', 'status'")):
        read_results_csv(p)


# -------------------------------------------------------------------------------------------------- validation


def test_rows_are_validated_with_named_errors():
    row = make_rows()[0]
    with pytest.raises(ValueError, match=re.escape(
            "The 'status' parameter of result row 0 (source_only / rotated_moons / seed 0) must be one of "
            "{'ok', 'failed', 'diverged', 'stale'}. Got 'crashed' instead.")):
        check_rows([dict(row, status="crashed")])
    with pytest.raises(ValueError, match=re.escape("Result row 0 lacks the key 'error'.")):
        check_rows([{k: v for k, v in row.items() if k != "error"}])
    with pytest.raises(ValueError, match=re.escape("'target_accuracy' parameter of result row 0")):
        check_rows([dict(row, target_accuracy=87.0)])  # percent instead of a fraction
    with pytest.raises(TypeError, match=re.escape("score column 'entropy'")):
        check_rows([dict(row, entropy="low")])
    with pytest.raises(ValueError, match=re.escape("Result rows 0 and 1 are both source_only / rotated_moons / seed 0")):
        check_rows([row, dict(row)])
    with pytest.raises(TypeError, match=re.escape("The 'reference' parameter of write_report")):
        write_report([row], os.devnull, reference=None)


# ---------------------------------------------------------------------------------------------------- recipes


@pytest.fixture(scope="module")
def plan(tmp_path_factory):
    """The plan of a grid with the methods and shifts of make_rows (planning trains nothing)."""
    from adaptkit.bench.plan import plan_grid

    from .helpers import NET

    shifts = [{"name": "rotated_moons", "params": {"n_source": 60, "n_target": 60}},
              {"name": "shifted_blobs", "params": {"n_source": 60}}]
    return plan_grid(methods=["source_only", {"name": "dann", "options": {"weight": 0.5}}, "target_oracle"],
                     shifts=shifts, seeds=[0, 1, 2], recipes={"rotated_moons": NET, "shifted_blobs": NET},
                     out_dir=str(tmp_path_factory.mktemp("plan")), workers=1)


def test_the_recipes_section_is_written_in_the_same_pass(tmp_path, plan, monkeypatch):
    import builtins
    import json
    from pathlib import Path

    from adaptkit.bench import report as report_module

    written = []
    real_write_with, real_open, real_read_text = report_module.write_with, builtins.open, Path.read_text

    def counting_write_with(path, *a, **k):
        written.append(Path(path).name)
        return real_write_with(path, *a, **k)

    def no_read_back(file, mode="r", *a, **k):
        assert not (str(file) == str(tmp_path / "report.md") and "r" in mode), "report.md was read back"
        return real_open(file, mode, *a, **k)

    def no_read_text(self, *a, **k):
        assert self != tmp_path / "report.md", "report.md was read back"  # (its template may be read)
        return real_read_text(self, *a, **k)

    monkeypatch.setattr(report_module, "write_with", counting_write_with)
    monkeypatch.setattr(builtins, "open", no_read_back)
    monkeypatch.setattr(Path, "read_text", no_read_text)
    path = write_report(make_rows(), tmp_path, plan=plan)
    monkeypatch.undo()

    assert written.count("report.md") == 1 and written[-1] == "report.md"  # once, after its charts
    text = path.read_text(encoding="utf-8")
    head, _, recipes = text.partition("\n## Recipes (shared by every method on a shift)\n")
    assert "## Failed and diverged runs" in head and "## Shift:" not in recipes  # the last section
    assert "Seeds [0, 1, 2], the same for every method" in recipes
    net = plan.recipes["rotated_moons"]
    # reference: json.dumps with sorted keys, the form the section promises for shift params and networks
    assert (f"- **shifted_blobs** (shift `shifted_blobs`, params `{json.dumps({'n_source': 60})}`): encoder "
            f"`{json.dumps(net['encoder'], sort_keys=True)}`, head `{json.dumps(net['head'], sort_keys=True)}`, "
            f"optimiser adam lr 0.01 ({net['optim']['schedule']} schedule), 20 steps, batch size 16.") in recipes
    assert "- **dann**: `dann` with `{\"weight\": 0.5}`" in recipes and "- **target_oracle**: `target_oracle`" in recipes
    assert text.endswith("`target_oracle`\n")
    assert "## Recipes" not in write_report(make_rows(), tmp_path / "bare").read_text(encoding="utf-8")


# -------------------------------------------------------------------------------------------- templates, tables


def test_the_templates_ship_inside_the_package():
    import fnmatch
    import tomllib
    from importlib import resources
    from pathlib import Path

    from adaptkit.bench.report import TEMPLATES

    folder = resources.files("adaptkit.bench").joinpath("templates")
    assert sorted(p.name for p in folder.iterdir() if p.name.endswith(".md")) == sorted(TEMPLATES)  # none unused
    pyproject = tomllib.loads((Path(__file__).resolve().parents[2] / "pyproject.toml").read_text())
    globs = pyproject["tool"]["setuptools"]["package-data"]["adaptkit"]
    for name in TEMPLATES:
        assert folder.joinpath(name).read_text(encoding="utf-8").strip()
        assert any(fnmatch.fnmatch(f"bench/templates/{name}", g) for g in globs), name  # in the wheel


def test_one_table_helper_writes_markdown_and_terminal_tables():
    from adaptkit.bench.report import table

    rows = [["dann", "87 ± 2"], ["source_only", "71.0 ± 2.5"]]
    assert table(["method", "acc."], rows) == ["| method | acc. |", "| --- | ---: |", "| dann | 87 ± 2 |",
                                               "| source_only | 71.0 ± 2.5 |"]
    assert table(["a", "b"], [["x", "y"]], "rl")[1] == "| ---: | --- |"
    text = table(["method", "acc."], rows, text=True)
    gap = " " * 13  # widths 11 and 10, two spaces between: "method" + 5 + 2 + 6 before "acc."
    assert text == [f"method{gap}acc.", "-----------  ----------", f"dann{gap}87 ± 2", "source_only  71.0 ± 2.5"]
    assert len({len(line) for line in text}) == 1  # padded to equal widths
