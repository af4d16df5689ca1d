"""A grid's cells through a hydra launcher (SLURM via submitit, Ray, joblib): ``launch=export``, then ``adaptkit-cell``.

A grid normally runs its cells in local worker processes (:mod:`.grid`, joblib's ``loky``). For a cluster, the grid
instead *exports* its pending cells — the same resume check and the same ``cell.json`` per cell folder, then one
file, ``<out_dir>/cells.json``, listing what each cell's worker needs — and hydra runs them, one job per cell:

    adaptkit-bench bench=demo launch=export out_dir=/shared/grid           # plan: writes cells.json, trains nothing
    adaptkit-cell -m hydra/launcher=slurm grid=/shared/grid 'cell=range(0,N)'  # the N pending cells, as SLURM jobs
    adaptkit-bench bench=demo out_dir=/shared/grid                          # collect: every cell reused, report written

Each job calls :func:`adaptkit.bench.cell.run_cell` — the grid's own worker function — on its cell: a cell that
raises records ``failure.json`` in its folder and fails alone; an interrupted or timed-out job leaves a resumable
checkpoint, and resubmitting the sweep resumes it (a finished cell is skipped). adaptkit schedules nothing itself:
the launcher (submitit, Ray, joblib) does. Exported cells do not watch a parent process (a cluster job has none
here); the grid folder's lock is released once ``cells.json`` is written, each cell's run folder keeps its own.

Example:
    >>> cell_job({"grid": "runs/bench/demo", "cell": 0})  # doctest: +SKIP
    {'dir': 'runs/bench/demo/cells/rotated_moons/source_only/seed0', 'status': 'ok', ...}
"""
from __future__ import annotations

from pathlib import Path
from typing import Any, Dict, List, Mapping

from .cell import run_cell

CELLS_FILE = "cells.json"  # the exported cells of a grid, in its out_dir
LAUNCHES = ("workers", "export")  # values of the bench setting `launch`


def export_cells(out_dir: Path, tasks: List[Dict[str, Any]]) -> Path:
    """Write ``tasks`` (the grid's pending cells, :func:`adaptkit.bench.cell.make_task`) to ``out_dir/cells.json``
    for :func:`cell_job`, without the parent to watch (a launcher's job has no grid process above it)."""
    from ..train import files

    plain = [{**t, "parent": None} for t in tasks]
    path = Path(out_dir) / CELLS_FILE
    files.write_json(path, {"format": 1, "cells": plain})
    return path


def command_line(out_dir: Path, n: int) -> str:
    """The ``adaptkit-cell`` sweep that runs the ``n`` exported cells (``hydra/launcher`` left to the user)."""
    cells = "cell=0" if n == 1 else f"'cell=range(0,{n})'"
    return f"adaptkit-cell -m hydra/launcher=<slurm|ray_cluster|submitit_local|joblib> grid={out_dir} {cells}"


def cell_job(cfg: Mapping[str, Any]) -> Dict[str, Any]:
    """Run cell ``cfg['cell']`` of the grid exported to ``cfg['grid']`` (the ``adaptkit-cell`` task function).
    Returns :func:`~adaptkit.bench.cell.run_cell`'s result; a bad index or a missing file is a ValueError naming
    what was found."""
    from .cell import read_json

    path = Path(str(cfg["grid"])) / CELLS_FILE
    data = read_json(path)
    if not data or not isinstance(data.get("cells"), list):
        raise ValueError(f"no exported cells at {str(path)!r}: run `adaptkit-bench ... launch=export "
                         f"out_dir={cfg['grid']}` first.")
    cells = data["cells"]
    i = cfg["cell"]
    if isinstance(i, bool) or not isinstance(i, int) or not 0 <= i < len(cells):
        raise ValueError(f"The 'cell' parameter of adaptkit-cell must be an integer in [0, {len(cells) - 1}] "
                         f"({len(cells)} cells exported to {str(path)!r}). Got {i!r} instead.")
    return run_cell(cells[i])


CELL_SCHEMA = "cell"  # the hydra primary config of adaptkit-cell


def register_cell_schema() -> None:
    """Store ``adaptkit-cell``'s primary config: ``grid`` (the exported grid's out_dir) and ``cell`` (an index into
    its cells.json), with hydra's own files kept under ``<grid>/.launch/`` (one sub-folder per cell)."""
    import dataclasses

    from hydra.core.config_store import ConfigStore
    from omegaconf import MISSING

    hydra_settings = {"run": {"dir": "${grid}/.launch/cell${cell}"},
                      "sweep": {"dir": "${grid}/.launch", "subdir": "cell${cell}"}, "job": {"chdir": False}}
    schema = dataclasses.make_dataclass(CELL_SCHEMA, [
        ("grid", str, dataclasses.field(default=MISSING)),  # the grid folder `adaptkit-bench launch=export` wrote
        ("cell", int, dataclasses.field(default=MISSING)),  # which exported cell: 0 … N−1
        ("hydra", Any, dataclasses.field(default_factory=lambda: dict(hydra_settings)))])
    ConfigStore.instance().store(name=CELL_SCHEMA, node=schema)
