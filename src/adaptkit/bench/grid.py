"""Running a grid: every cell of a plan (:mod:`.plan`) trained in parallel, resumably, one failure at a time.

**Cells.** Each (shift, method, seed) is an ordinary run folder, ``<out_dir>/cells/<shift>/<method>/seed<k>/``,
trained by :func:`adaptkit.bench.cell.run_cell`. Cells run in worker processes through joblib's ``loky`` backend,
one torch thread each by default and ``os.cpu_count()`` workers. The grid is a *single* hydra job that drives joblib
itself rather than a hydra multirun through the joblib launcher: one process then owns the plan, the resume logic,
the fault isolation and the report, and a multirun would start a hydra job (and a config composition) per cell.
For a cluster, ``launch=export`` plans and resume-checks the grid, writes ``cells.json`` and trains nothing; hydra's
launchers (submitit, Ray, joblib) then run the cells with ``adaptkit-cell -m`` and a rerun of the grid collects them
(:mod:`.launch`).

**Resume.** Rerunning the same grid skips every cell whose newest record is a finished summary of the cell's
planned settings and runs the rest; an unfinished cell resumes from its checkpoint. A cell's newest record — its
``summary.json`` or its ``failure.json``, whichever was written last — counts only when the config hash it records
equals the hash of the cell's planned settings (:func:`adaptkit.run.settings_hash`). A cell whose ``cell.json``
differs from the current plan (say, the steps changed), or whose newest record carries another config hash, is
refused with the cell's name, unless ``overwrite=true`` (which retrains it). A record of other settings that
appears while the grid runs is reported with status ``stale``, never as ``ok``.

**Interruption.** SIGINT/SIGTERM stops each running cell at a step boundary with a checkpoint; the grid then
starts no more cells, writes the results of the finished ones and raises ``Interrupted``; a rerun resumes.

**Faults.** A cell that raises — a ``ValueError`` from a method's setup, a ``DivergenceError`` from the loop,
anything else — is recorded in ``failure.json`` in its folder (status ``failed`` or ``diverged``, the error and
its traceback; written atomically) and the grid goes on. A rerun retries failed cells (``retry_failed=false``
keeps their failure).

**One writer.** A grid holds an OS-level lock on its ``out_dir`` (:class:`adaptkit.train.files.FolderLock`, the
run folders' lock) from before it looks at any cell folder until its results are written; the operating system
releases it when the process dies, however it dies. A second grid or study on the same ``out_dir`` fails at once
with :class:`~adaptkit.train.files.FolderBusy` naming the holder (process id, host, command, start time).

**Results.** At the end ``results.csv`` and ``report.md`` (with its charts and recipes section) are rebuilt from
the cell folders, never appended to (:mod:`.report`).

Example:
    >>> from adaptkit.bench.grid import run_grid
    >>> result = run_grid("tiny", out_dir="runs/bench/tiny", workers=2)  # doctest: +SKIP
    >>> print(result.table())  # doctest: +SKIP
"""
from __future__ import annotations

import shutil
import sys
import time
from contextlib import closing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Optional, Tuple

from . import report
from .cell import CELL_SPEC, FAILURE, STALE, SUMMARY, cell_curve, cell_row, cell_state, make_task, read_json, run_cell
from .plan import Cell, GridPlan, check_registered_in_workers, plan_grid

__all__ = ["GridResult", "collect_results", "execute", "lock_grid", "run_grid"]

GRID_FOLDER = "grid folder"  # what the lock's refusal calls out_dir


@dataclass
class GridResult:
    """What a grid run leaves: the rows of ``results.csv`` and where the files are."""

    plan: GridPlan
    rows: List[Dict[str, Any]]
    out_dir: Path
    results_csv: Optional[Path]
    report: Optional[Path]
    ran: int  # cells trained (or retried) by this call
    reused: int  # cells already finished (or failed, with retry_failed=false) and skipped
    pending: int  # cells not run yet (max_cells reached or interrupted): rerun to finish
    wall_seconds: float
    counts: Dict[str, int] = field(default_factory=dict)  # status -> rows

    @property
    def complete(self) -> bool:
        return self.pending == 0

    def table(self) -> str:
        """The text table of the rows, methods in the report's order (baseline, reference, …, oracle)."""
        p = self.plan
        methods = report.method_order([m.label for m in p.methods], p.baseline, p.reference, p.oracle)
        return report.format_table(self.rows, methods, [s.label for s in p.shifts], seeds=len(p.seeds))


def collect_results(plan: GridPlan) -> Tuple[List[Dict[str, Any]], Dict[tuple, list], List[Cell]]:
    """Read every cell folder of ``plan``: ``(rows, curves, pending cells)``, rows in plan order."""
    rows, curves, pending = [], {}, []
    for cell in plan.cells:
        d = plan.out_dir / cell.relpath
        row = cell_row(cell, d, make_task(plan, cell)["config_hash"])
        if row is None:
            pending.append(cell)
            continue
        rows.append(row)
        if row["status"] == "ok":
            pts = cell_curve(d)
            if pts:
                curves[cell.key] = pts
    return rows, curves, pending


def _prepare(plan: GridPlan) -> Tuple[List[Cell], int]:
    """Check the cell folders against the plan; return the cells to run and how many are reused."""
    to_run, reused, stale = [], 0, []
    for cell in plan.cells:
        d = plan.out_dir / cell.relpath
        if plan.overwrite:
            shutil.rmtree(d, ignore_errors=True)
            to_run.append(cell)
            continue
        state = cell_state(d, make_task(plan, cell)["config_hash"])
        stored = read_json(d / CELL_SPEC)
        if state != "new" or stored is not None:
            if stored != cell.spec(plan.scores) or state == STALE:
                stale.append(cell)
                continue
        if state == "finished" or (state == "failed" and not plan.retry_failed):
            reused += 1
        else:
            to_run.append(cell)
    if stale:
        names = ", ".join(c.name() for c in stale[:3]) + (f" and {len(stale) - 3} more" if len(stale) > 3 else "")
        raise ValueError(f"{len(stale)} cell folder(s) under {str(plan.out_dir)!r} were written with other settings "
                         f"than this grid's ({names}; compare their {CELL_SPEC}, and the config_hash in their "
                         f"{SUMMARY} or {FAILURE}). Choose another out_dir, or pass overwrite=true to retrain the "
                         "grid.")
    return to_run, reused


def _cost(cell: Cell) -> float:
    """A rough relative cost, to start the longest cells first (shorter tail when workers run out of cells)."""
    conv = 4.0 if "cnn" in str(cell.recipe["encoder"].get("name", "")) else 1.0
    return cell.recipe["steps"] * conv


def _log(plan: GridPlan, msg: str) -> None:
    if plan.verbose:
        print(msg, flush=True)


def _results(plan: GridPlan, tasks: List[Dict[str, Any]], workers: int):
    """The workers' results on ``tasks``, in the order they finish; closing this stops the queued ones."""
    from joblib import Parallel, delayed, parallel_config

    with parallel_config(backend="loky", inner_max_num_threads=plan.threads_per_worker):
        results = Parallel(n_jobs=workers, return_as="generator_unordered")(delayed(run_cell)(t) for t in tasks)
        try:
            yield from results
        finally:
            results.close()  # joblib cancels the queued cells


def lock_grid(plan: GridPlan):
    """The lock on ``plan.out_dir`` (a context manager): one writer per grid folder, released by the operating
    system when the holder dies. A second holder gets :class:`~adaptkit.train.files.FolderBusy` at once."""
    from ..train.files import FolderLock

    return FolderLock(plan.out_dir, what=GRID_FOLDER)


def execute(plan: GridPlan, *, write_report: bool = True, lock: bool = True) -> GridResult:
    """Run the pending cells of ``plan`` in parallel, then rebuild ``results.csv`` and (unless
    ``write_report=False``, as for a selection study) ``report.md`` with its charts. Holds the grid folder's lock
    throughout (``lock=False``: the caller holds it already, as the selection study does)."""
    if lock:
        with lock_grid(plan):
            return _execute(plan, write_report)
    return _execute(plan, write_report)


def _execute(plan: GridPlan, write_report: bool) -> GridResult:
    from ..train import files

    t0 = time.perf_counter()
    to_run, reused = _prepare(plan)  # refuses stale cell folders before writing anything
    if plan.max_cells is not None:
        to_run = to_run[:plan.max_cells]
    if min(plan.workers, len(to_run)) > 1:  # worker processes: they must be able to register what the cells name
        check_registered_in_workers(plan.methods, plan.shifts, plan.config.get("imports") or [])
    plan.out_dir.mkdir(parents=True, exist_ok=True)
    report.write_resolved_config(plan.config, plan.out_dir)
    to_run = sorted(to_run, key=_cost, reverse=True)  # stable: plan order among equal costs
    for cell in to_run:
        d = plan.out_dir / cell.relpath
        (d / FAILURE).unlink(missing_ok=True)  # a retried cell starts without its old failure,
        (d / SUMMARY).unlink(missing_ok=True)  # and without a summary that a newer failure outranked
        files.write_json(d / CELL_SPEC, cell.spec(plan.scores))

    workers = max(1, min(plan.workers, len(to_run)))
    _log(plan, f"grid {plan.name!r}: {len(plan.methods)} methods × {len(plan.shifts)} shifts × {len(plan.seeds)} "
               f"seeds = {len(plan.cells)} cells; {reused} already done, running {len(to_run)} on {workers} "
               f"worker{'s' if workers > 1 else ''} -> {plan.out_dir}")
    done, interrupted = 0, None
    tasks = [make_task(plan, c) for c in to_run]
    if plan.config.get("launch") == "export":  # a hydra launcher runs the cells (bench/launch.py)
        from .launch import command_line, export_cells

        path = export_cells(plan.out_dir, tasks)
        _log(plan, f"exported {len(tasks)} cell(s) to {path}; run them with\n  {command_line(plan.out_dir, len(tasks))}"
                   "\nthen rerun this command without launch=export to collect the results")
        tasks = []
    names = {t["dir"]: c.name() for t, c in zip(tasks, to_run)}
    if tasks:
        try:
            with closing(_results(plan, tasks, workers)) as results:
                for r in results:
                    done += 1
                    acc = "" if r["target_accuracy"] is None else f" target {r['target_accuracy']:.3f}"
                    err = f" — {r['error'].splitlines()[0][:160]}" if r["error"] and r["status"] != "ok" else ""
                    _log(plan, f"[{done:>{len(str(len(tasks)))}}/{len(tasks)}] {names[r['dir']]}: "
                               f"{r['status']}{acc} ({r['seconds']:.1f}s){err}")
                    if r["status"] == "interrupted":  # SIGINT/SIGTERM reached the workers: start no more cells
                        interrupted = r["error"]
                        break
        except BaseException as e:  # Ctrl-C, a killed worker: keep what is done, then stop
            print(f"grid stopped after {done} of {len(tasks)} cells ({type(e).__name__}: {e}); writing the results "
                  "of the finished cells. Rerun the same command to resume.", file=sys.stderr, flush=True)
            try:
                _write_outputs(plan, write_report)
            except Exception as inner:  # noqa: BLE001 — the original error matters more
                print(f"could not write the partial results: {inner}", file=sys.stderr)
            raise

    rows, pending, csv_path, report_path = _write_outputs(plan, write_report)
    counts: Dict[str, int] = {}
    for r in rows:
        counts[r["status"]] = counts.get(r["status"], 0) + 1
    result = GridResult(plan=plan, rows=rows, out_dir=plan.out_dir, results_csv=csv_path, report=report_path,
                        ran=done, reused=reused, pending=len(pending), wall_seconds=time.perf_counter() - t0,
                        counts=counts)
    if pending:
        _log(plan, f"{len(pending)} of {len(plan.cells)} cells not run yet: rerun the same command to finish them.")
    if interrupted is not None:
        from ..train.loop import Interrupted

        raise Interrupted(f"grid interrupted with {len(pending)} of {len(plan.cells)} cells unfinished; results of the "
                          f"finished cells are in {plan.out_dir}. Rerun the same command to resume.")
    return result


def _write_outputs(plan: GridPlan, write_report: bool):
    """Rebuild ``results.csv`` and ``report.md`` from the cell folders (never appended to)."""
    rows, curves, pending = collect_results(plan)
    csv_path = report_path = None
    if rows:
        csv_path = report.write_results_csv(rows, plan.out_dir / report.RESULTS_CSV)
    if rows and write_report:
        report_path = report.write_report(rows, plan.out_dir, reference=plan.reference, baseline=plan.baseline,
                                          oracle=plan.oracle, curves=curves, plan=plan)
    return rows, pending, csv_path, report_path


def run_grid(config: Any = None, **overrides) -> GridResult:
    """Plan and run a grid; returns a :class:`GridResult`.

    ``config``: ``None`` for the shipped default grid, a named grid (``"tiny"``, ``"demo"``), or a composed config /
    mapping. Keyword ``overrides`` set bench keys (``methods=[...]``, ``shifts=[...]``, ``seeds=[0, 1]``,
    ``out_dir=...``, ``workers=2``, ``recipes={"rotated_moons": {"steps": 200}}``, ``max_cells=3``, …).

    Example:
        >>> r = run_grid("tiny", methods=["source_only", "coral"], out_dir="runs/bench/mine")  # doctest: +SKIP
        >>> r.report  # doctest: +SKIP
        PosixPath('runs/bench/mine/report.md')
    """
    return execute(plan_grid(config, **overrides))
