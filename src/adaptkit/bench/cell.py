"""One cell of a grid: the worker that trains it (:func:`run_cell`) and the readers of its folder.

A cell is an ordinary run folder, ``<out_dir>/cells/<shift>/<method>/seed<k>/``, written by :func:`adaptkit.fit`
(config.yaml, metrics.jsonl, checkpoint.pt, summary.json) plus ``cell.json``, the grid's description of the cell,
and — when training raised — ``failure.json``. The worker receives a plain *task* dict (:func:`make_task`), so that
it runs the same in a joblib worker process as in the caller's; its one call that trains is :func:`train_cell`.

**Workers die with their parent.** A worker process watches the grid process that sent it the task
(:func:`watch_parent`): when that process dies — even by SIGKILL, which runs no clean-up — the worker ends at once,
writing nothing more (its cell keeps its last checkpoint and resumes on the next run). Without this, loky's
workers outlive a ``kill -9`` of the grid and go on writing results into a folder that a new grid may own.

Example:
    >>> out = run_cell(task)  # doctest: +SKIP
    >>> out["status"], cell_row(cell, Path(out["dir"]))["target_accuracy"]  # doctest: +SKIP
    ('ok', 0.87)
"""
from __future__ import annotations

import json
import math
import os
import signal
import sys
import threading
import time
import traceback
from pathlib import Path
from typing import Any, Dict, List, Optional, Tuple

from .plan import Cell, GridPlan

__all__ = ["CELL_SPEC", "FAILURE", "make_task", "train_cell", "run_cell", "watch_parent", "read_json", "cell_state",
           "cell_row", "cell_curve"]

CELL_SPEC = "cell.json"  # the grid's description of a cell, checked on resume
FAILURE = "failure.json"  # written by a cell that raised


def make_task(plan: GridPlan, cell: Cell) -> Dict[str, Any]:
    """What a worker needs to train ``cell`` of ``plan``: plain values only (it crosses a process boundary)."""
    return {"dir": str(plan.out_dir / cell.relpath), "method": cell.method.spec(), "shift": cell.shift.spec(),
            "seed": cell.seed, "recipe": cell.recipe, "scores": plan.scores, "device": plan.device,
            "threads": plan.threads_per_worker, "sys_path": [p or os.getcwd() for p in sys.path],
            "parent": os.getpid()}


# --------------------------------------------------------------------------------------------------------------
# a worker ends with its parent

WATCH_SECONDS = 0.5  # how often the fallback thread looks for the parent
ORPHANED = 70  # the exit status of a worker whose parent died (EX_SOFTWARE)
_watched: Dict[str, Any] = {}  # {"pid": the parent this process watches}: one watchdog per worker process


def watch_parent(parent: Optional[int]) -> None:
    """End this process when process ``parent`` dies, however it dies. A no-op in the parent itself (one worker:
    cells run in the caller's process) and when already watching.

    Two mechanisms, because neither alone is enough everywhere:

    * Linux: ``prctl(PR_SET_PDEATHSIG, SIGKILL)`` (man prctl(2)) through ``ctypes``, when ``parent`` is this
      process's parent: the kernel kills this process the moment the parent goes. (The kernel ties it to the
      parent *thread* that created the worker — joblib's calling thread or loky's manager thread, both alive
      while a grid runs.)
    * Everywhere: a daemon thread that every :data:`WATCH_SECONDS` checks ``os.getppid()`` (a direct child is
      re-parented when its parent dies) or, for a process that is not a direct child, whether ``parent`` still
      exists; when it is gone, ``os._exit(ORPHANED)`` — no clean-up, no result written.
    """
    if parent is None or parent == os.getpid() or _watched.get("pid") == parent:
        return
    direct = os.getppid() == parent
    if direct and sys.platform.startswith("linux"):
        try:
            import ctypes

            pr_set_pdeathsig = 1  # <linux/prctl.h>
            ctypes.CDLL(None, use_errno=True).prctl(pr_set_pdeathsig, int(signal.SIGKILL), 0, 0, 0)
        except (OSError, AttributeError):  # no libc symbol: the thread below still watches
            pass
    if not _parent_alive(parent, direct):  # it died before the watch began
        os._exit(ORPHANED)
    _watched["pid"] = parent
    threading.Thread(target=_watch, args=(parent, direct), name="adaptkit-parent-watch", daemon=True).start()


def _parent_alive(parent: int, direct: bool) -> bool:
    if direct:
        return os.getppid() == parent
    if os.name == "nt":  # os.kill(pid, 0) would terminate the process on Windows: no probe
        return True
    try:
        os.kill(parent, 0)  # signal 0: only checks that the process exists (man kill(2))
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


def _watch(parent: int, direct: bool) -> None:
    while _parent_alive(parent, direct):
        time.sleep(WATCH_SECONDS)
    os._exit(ORPHANED)


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
    watch_parent(task.get("parent"))  # in a worker process: end with the grid process
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
