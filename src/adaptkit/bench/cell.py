"""One cell of a grid: the worker that trains it (:func:`run_cell`) and the readers of its folder.

A cell is an ordinary run folder, ``<out_dir>/cells/<shift>/<method>/seed<k>/``, written by :func:`adaptkit.fit`
(config.yaml, metrics.jsonl, checkpoint.pt, summary.json) plus ``cell.json``, the grid's description of the cell,
and — when training raised — ``failure.json``. The worker receives a plain *task* dict (:func:`make_task`), so that
it runs the same in a joblib worker process as in the caller's; its one call that trains is :func:`train_cell`.

Example:
    >>> out = run_cell(task)  # doctest: +SKIP
    >>> out["status"], cell_row(cell, Path(out["dir"]))["target_accuracy"]  # doctest: +SKIP
    ('ok', 0.87)
"""
from __future__ import annotations

import json
import math
import os
import sys
import time
import traceback
from pathlib import Path
from typing import Any, Dict, List, Optional, Tuple

from .plan import Cell, GridPlan

__all__ = ["CELL_SPEC", "FAILURE", "make_task", "train_cell", "run_cell", "read_json", "cell_state", "cell_row",
           "cell_curve"]

CELL_SPEC = "cell.json"  # the grid's description of a cell, checked on resume
FAILURE = "failure.json"  # written by a cell that raised


def make_task(plan: GridPlan, cell: Cell) -> Dict[str, Any]:
    """What a worker needs to train ``cell`` of ``plan``: plain values only (it crosses a process boundary)."""
    return {"dir": str(plan.out_dir / cell.relpath), "method": cell.method.spec(), "shift": cell.shift.spec(),
            "seed": cell.seed, "recipe": cell.recipe, "scores": plan.scores, "device": plan.device,
            "threads": plan.threads_per_worker, "sys_path": [p or os.getcwd() for p in sys.path]}


def train_cell(task: Dict[str, Any]):
    """Train the cell described by ``task`` into ``task['dir']``; returns the :class:`adaptkit.Run`. The one place
    the harness calls the trainer: the recipe is the shift's share of the run settings, the grid adds the rest."""
    from ..config import run_config
    from ..run import train

    return train(run_config(task["recipe"], method={"name": task["method"]["name"], **task["method"]["options"]},
                            data={"name": task["shift"]["name"], **task["shift"]["params"]}, seed=task["seed"],
                            scores=list(task["scores"]), device=task["device"], run_dir=task["dir"],
                            progress=False))


def run_cell(task: Dict[str, Any]) -> Dict[str, Any]:
    """Train one cell into ``task['dir']`` and return ``{'dir', 'status', 'target_accuracy', 'seconds', 'error'}``.

    Runs in a worker process (or in the caller's, with one worker). Any exception is recorded in the cell's
    ``failure.json`` (``DivergenceError`` as ``diverged``, anything else as ``failed``) and returned, never raised;
    an interruption (SIGINT/SIGTERM) leaves a resumable checkpoint and no failure record.
    """
    for p in reversed(task.get("sys_path", [])):  # a spawned worker finds the user's modules as the parent did
        if p not in sys.path:
            sys.path.insert(0, p)
    import torch

    from ..train import files
    from ..train.loop import DivergenceError, Interrupted

    cell_dir = Path(task["dir"])
    threads = torch.get_num_threads()
    torch.set_num_threads(task["threads"])
    t0 = time.perf_counter()
    out = {"dir": str(cell_dir), "status": "ok", "target_accuracy": None, "error": None}
    try:
        out["target_accuracy"] = train_cell(task).summary.get("target_accuracy")
    except Interrupted as e:
        out.update(status="interrupted", error=str(e))
    except Exception as e:  # noqa: BLE001 — fault isolation: any error is this cell's result, not the grid's
        status = "diverged" if isinstance(e, DivergenceError) else "failed"
        error = f"{type(e).__name__}: {e}"
        out.update(status=status, error=error)
        files.write_json(cell_dir / FAILURE, {
            "status": status, "error": error, "traceback": traceback.format_exc(),
            "step": _last_step(cell_dir), "wall_seconds": round(time.perf_counter() - t0, 3),
        })
    finally:
        torch.set_num_threads(threads)
    out["seconds"] = time.perf_counter() - t0
    return out


# --------------------------------------------------------------------------------------------------------------
# reading a cell folder


def read_json(path: Path) -> Optional[Dict[str, Any]]:
    """The JSON object in ``path``; ``None`` when it is absent, torn or foreign (our writes are atomic)."""
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def _last_step(cell_dir: Path) -> Optional[int]:
    try:
        lines = (cell_dir / "metrics.jsonl").read_text(encoding="utf-8").splitlines()
        return int(json.loads(lines[-1])["step"]) if lines else None
    except (OSError, ValueError, KeyError, IndexError):
        return None


def cell_state(cell_dir: Path) -> str:
    """``finished``, ``failed`` (or diverged), ``started`` or ``new``."""
    summary = read_json(cell_dir / "summary.json")
    if summary is not None and summary.get("status") == "finished":
        return "finished"
    if (cell_dir / FAILURE).exists():
        return "failed"
    return "started" if (cell_dir / "checkpoint.pt").exists() else "new"


def cell_row(cell: Cell, cell_dir: Path) -> Optional[Dict[str, Any]]:
    """The result row of a cell from its folder; ``None`` while the cell has not finished or failed."""
    base = {"method": cell.method.label, "shift": cell.shift.label, "seed": cell.seed}
    summary = read_json(cell_dir / "summary.json")
    if summary is not None and summary.get("status") == "finished":
        final = summary.get("final") or {}
        row = {**base, "status": "ok", "target_accuracy": summary.get("target_accuracy"),
               "source_val_accuracy": summary.get("source_val_accuracy"), "steps": summary.get("steps"),
               "wall_seconds": summary.get("wall_seconds"), "error": None}
        for k, v in sorted(final.items()):
            if k.startswith("score/"):
                row[k] = None if v is None or (isinstance(v, float) and not math.isfinite(v)) else float(v)
        return row
    failure = read_json(cell_dir / FAILURE)
    if failure is not None:
        status = failure.get("status") if failure.get("status") in ("failed", "diverged") else "failed"
        return {**base, "status": status, "target_accuracy": None, "source_val_accuracy": None,
                "steps": failure.get("step"), "wall_seconds": failure.get("wall_seconds"),
                "error": str(failure.get("error") or "") or None}
    return None


def cell_curve(cell_dir: Path) -> List[Tuple[int, float]]:
    """The learning curve ``[(step, target_accuracy), …]`` from the cell's ``metrics.jsonl`` (empty when absent)."""
    try:
        lines = (cell_dir / "metrics.jsonl").read_text(encoding="utf-8").splitlines()
    except OSError:
        return []
    points = []
    for line in lines:
        try:
            rec = json.loads(line)
        except ValueError:
            continue
        if rec.get("target_accuracy") is not None and "step" in rec:
            points.append((int(rec["step"]), float(rec["target_accuracy"])))
    return points
