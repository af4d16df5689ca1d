"""One cell of a grid: the worker that trains it (:func:`run_cell`) and the readers of its folder.

A cell is an ordinary run folder, ``<out_dir>/cells/<shift>/<method>/seed<k>/``, written by :func:`adaptkit.fit`
(config.yaml, metrics.jsonl, checkpoint.pt, summary.json) plus ``cell.json``, the grid's description of the cell,
and — when training raised — ``failure.json``. A cell's result is its newest record (summary or failure, by
modification time), and only when the config hash that record carries is the hash of the cell's planned settings
(:func:`planned_hash`, in every task): a record of other settings reads as status ``stale``, never ``ok``. The worker receives a plain *task* dict (:func:`make_task`), so that
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

__all__ = ["CELL_SPEC", "FAILURE", "STALE", "make_task", "cell_config", "planned_hash", "train_cell", "run_cell",
           "watch_parent", "read_json", "cell_record", "cell_state", "cell_row", "cell_curve"]

CELL_SPEC = "cell.json"  # the grid's description of a cell, checked on resume
FAILURE = "failure.json"  # written by a cell that raised


def make_task(plan: GridPlan, cell: Cell) -> Dict[str, Any]:
    """What a worker needs to train ``cell`` of ``plan``: plain values only (it crosses a process boundary).
    ``config_hash`` is the hash the cell's run will record (:func:`planned_hash`); ``parent`` the grid process."""
    task = {"dir": str(plan.out_dir / cell.relpath), "method": cell.method.spec(), "shift": cell.shift.spec(),
            "seed": cell.seed, "recipe": cell.recipe, "scores": plan.scores, "device": plan.device,
            "threads": plan.threads_per_worker, "sys_path": [p or os.getcwd() for p in sys.path],
            "parent": os.getpid(), "imports": list(plan.config.get("imports") or [])}
    task["config_hash"] = planned_hash(task)
    return task


def cell_config(task: Dict[str, Any]):
    """The :class:`~adaptkit.config.RunConfig` of the cell ``task`` describes: the recipe is the shift's share of
    the run settings, the grid adds the rest."""
    from ..config import run_config

    return run_config(task["recipe"], method={"name": task["method"]["name"], **task["method"]["options"]},
                      data={"name": task["shift"]["name"], **task["shift"]["params"]}, seed=task["seed"],
                      scores=list(task["scores"]), device=task["device"], run_dir=task["dir"], progress=False,
                      imports=list(task.get("imports", [])))  # imported by the run, in the worker, before all else


def planned_hash(task: Dict[str, Any]) -> Optional[str]:
    """The config hash a run of ``task``'s settings records (:func:`adaptkit.run.settings_hash`); ``None`` when
    the settings cannot even be resolved — the cell then fails in its worker, and its failure records ``None``."""
    from ..run import settings_hash

    try:
        return settings_hash(cell_config(task))
    except (ValueError, TypeError, ImportError, AttributeError, KeyError):
        return None


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
    from ..run import train

    return train(cell_config(task))


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
            "config_hash": task.get("config_hash"),  # which settings failed: compared as a summary's is
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


SUMMARY = "summary.json"
STALE = "stale"  # the status of a cell whose newest record was written with other settings than the plan's


def cell_record(cell_dir: Path) -> Tuple[Optional[str], Optional[Dict[str, Any]]]:
    """The newest record of a cell: ``("finished", summary)``, ``("failed", failure)`` or ``(None, None)``.

    A finished ``summary.json`` and a ``failure.json`` can both be present (training finished, then the
    diagnostics raised; or a run of other settings wrote one of them); the one written last (modification time)
    is the cell's state — a tie goes to the failure, the cautious reading."""
    found = []
    for kind, name in (("finished", SUMMARY), ("failed", FAILURE)):
        record = read_json(cell_dir / name)
        if record is None or (kind == "finished" and record.get("status") != "finished"):
            continue
        try:
            mtime = (cell_dir / name).stat().st_mtime_ns
        except OSError:
            continue
        found.append((mtime, kind == "failed", kind, record))
    if not found:
        return None, None
    _, _, kind, record = max(found, key=lambda t: (t[0], t[1]))
    return kind, record


def _stale_reason(kind: str, record: Dict[str, Any], planned: Optional[str]) -> Optional[str]:
    """Why a record does not belong to the planned settings (``None``: it does)."""
    got = record.get("config_hash")
    if got == planned:
        return None
    name = SUMMARY if kind == "finished" else FAILURE
    return (f"{name} was written with config hash {got!r}, but this cell's planned settings hash to {planned!r} "
            "(a run of other settings wrote it); rerun the grid with overwrite=true to retrain the cell.")


def cell_state(cell_dir: Path, planned: Optional[str]) -> str:
    """``finished``, ``failed`` (or diverged), ``stale`` (the newest record was written with another config hash
    than ``planned``, the hash of the cell's planned settings), ``started`` or ``new``."""
    kind, record = cell_record(cell_dir)
    if kind is not None:
        return STALE if _stale_reason(kind, record, planned) else kind
    return "started" if (cell_dir / "checkpoint.pt").exists() else "new"


def cell_row(cell: Cell, cell_dir: Path, planned: Optional[str]) -> Optional[Dict[str, Any]]:
    """The result row of a cell from its newest record; ``None`` while the cell has not finished or failed.
    A record whose config hash is not ``planned`` (the hash of the cell's planned settings) is never a result:
    its row has status ``stale``, no accuracy and no steps, and names both hashes."""
    base = {"method": cell.method.label, "shift": cell.shift.label, "seed": cell.seed}
    kind, record = cell_record(cell_dir)
    if kind is None:
        return None
    stale = _stale_reason(kind, record, planned)
    if stale is not None:
        return {**base, "status": STALE, "target_accuracy": None, "source_val_accuracy": None, "steps": None,
                "wall_seconds": None, "error": stale}
    if kind == "finished":
        summary = record
        final = summary.get("final") or {}
        row = {**base, "status": "ok", "target_accuracy": summary.get("target_accuracy"),
               "source_val_accuracy": summary.get("source_val_accuracy"), "steps": summary.get("steps"),
               "wall_seconds": summary.get("wall_seconds"), "error": None}
        for k, v in sorted(final.items()):
            if k.startswith("score/"):
                row[k] = None if v is None or (isinstance(v, float) and not math.isfinite(v)) else float(v)
        return row
    failure = record
    status = failure.get("status") if failure.get("status") in ("failed", "diverged") else "failed"
    return {**base, "status": status, "target_accuracy": None, "source_val_accuracy": None,
            "steps": failure.get("step"), "wall_seconds": failure.get("wall_seconds"),
            "error": str(failure.get("error") or "") or None}


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
