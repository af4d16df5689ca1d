"""A grid's cells through a hydra launcher: ``launch=export`` plans and writes ``cells.json`` (training nothing),
each exported cell trained by ``adaptkit.bench.launch.cell_job`` (what ``adaptkit-cell`` runs in a launcher's job)
gives the same results as the grid's own workers, and the grid then reuses every cell and writes its report."""
import csv
import json
import os
import re
import subprocess
import sys

import pytest

from adaptkit.bench.grid import run_grid
from adaptkit.bench.launch import CELLS_FILE, cell_job

GRID = dict(methods=["source_only", "coral"], shifts=[{"name": "rotated_moons", "params": {"n_source": 80,
                                                                                         "n_target": 80}}],
            seeds=[0], recipes={"rotated_moons": {"steps": 10, "batch_size": 16, "eval_every": 5}}, workers=1,
            verbose=False)


def _rows(out_dir):
    with open(out_dir / "results.csv", newline="") as f:
        return {(r["method"], r["seed"]): r for r in csv.DictReader(f)}


def test_exported_cells_match_the_grids_own_workers_and_are_reused(tmp_path):
    exported = run_grid("tiny", out_dir=str(tmp_path / "g"), launch="export", **GRID)
    assert exported.ran == 0 and exported.pending == 2  # planned, nothing trained
    cells = json.loads((tmp_path / "g" / CELLS_FILE).read_text())["cells"]
    assert len(cells) == 2 and all(c["parent"] is None for c in cells)  # a cluster job has no grid process above it
    for i in range(len(cells)):
        assert cell_job({"grid": str(tmp_path / "g"), "cell": i})["status"] == "ok"
    collected = run_grid("tiny", out_dir=str(tmp_path / "g"), **GRID)
    assert (collected.ran, collected.reused, collected.pending) == (0, 2, 0)
    # the reference: the same grid run by its own worker path, in another folder
    direct = run_grid("tiny", out_dir=str(tmp_path / "d"), **GRID)
    assert direct.ran == 2
    a, b = _rows(tmp_path / "g"), _rows(tmp_path / "d")
    assert a.keys() == b.keys() and all(a[k]["target_accuracy"] == b[k]["target_accuracy"] for k in a)
    assert (tmp_path / "g" / "report.md").exists()


def test_bad_launch_and_bad_cell_are_named(tmp_path):
    with pytest.raises(ValueError, match=re.escape("The 'launch' parameter of the bench config must be one of "
                                                   "{'workers', 'export'}. Got 'slurm' instead.")):
        run_grid("tiny", out_dir=str(tmp_path / "g"), launch="slurm", **GRID)
    with pytest.raises(ValueError, match="no exported cells at"):
        cell_job({"grid": str(tmp_path / "none"), "cell": 0})
    run_grid("tiny", out_dir=str(tmp_path / "g"), launch="export", **GRID)
    with pytest.raises(ValueError, match=re.escape("The 'cell' parameter of adaptkit-cell must be an integer in "
                                                   "[0, 1] (2 cells exported to")):
        cell_job({"grid": str(tmp_path / "g"), "cell": 2})


try:
    import hydra_plugins.hydra_submitit_launcher  # noqa: F401
    SUBMITIT = True
except ImportError:
    SUBMITIT = False


@pytest.mark.slow
@pytest.mark.skipif(not SUBMITIT, reason="hydra-submitit-launcher is not installed (pip install 'adaptkit[slurm]')")
def test_a_grid_runs_its_cells_as_submitit_jobs(tmp_path):
    run_grid("tiny", out_dir=str(tmp_path / "g"), launch="export", **GRID)
    env = {**os.environ, "OMP_NUM_THREADS": "1", "HYDRA_FULL_ERROR": "0"}
    out = subprocess.run([sys.executable, "-c", "from adaptkit.cli import cell_main; cell_main()", "-m",
                          "hydra/launcher=submitit_local", "hydra.launcher.timeout_min=5", f"grid={tmp_path / 'g'}",
                          "cell=range(0,2)"], capture_output=True, text=True, env=env, timeout=300, cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    assert len(list((tmp_path / "g" / ".launch" / ".submitit").iterdir())) >= 2  # submitit ran two jobs
    collected = run_grid("tiny", out_dir=str(tmp_path / "g"), **GRID)
    assert (collected.ran, collected.reused, collected.counts) == (0, 2, {"ok": 2})
