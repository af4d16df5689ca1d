"""The two bench commands: ``adaptkit-bench`` runs a grid (:func:`grid_command`), ``adaptkit-study`` a selection
study (:func:`study_command`). Each takes a composed config, runs it, then prints the text table, where the files
are and the safety texts. The command, not the config, decides which one runs: a grid config with a ``sweep`` is
refused by ``adaptkit-bench`` with the study command to use instead.

Example:
    >>> from adaptkit.bench.config import compose_bench
    >>> result = grid_command(compose_bench(["bench=tiny", "workers=1"]))  # doctest: +SKIP
"""
from __future__ import annotations

import sys
from typing import Optional

from ..safety import ADAPTATION_WARNING, SCORE_WARNING
from .grid import GridResult, run_grid
from .judge import StudyResult
from .report import study_table
from .study import run_study

__all__ = ["GRID_COMMAND", "STUDY_COMMAND", "grid_command", "study_command", "print_summary"]

GRID_COMMAND = "adaptkit-bench"
STUDY_COMMAND = "adaptkit-study"


def grid_command(cfg) -> GridResult:
    """``adaptkit-bench``: run the composed grid, then print the table, the files and the warning."""
    sweep = cfg.get("sweep")
    if sweep:
        raise ValueError(f"{GRID_COMMAND} runs grids without a sweep, and this config sweeps "
                         f"{', '.join(map(str, sweep))}: a sweep is a selection study, so run it with "
                         f"`{STUDY_COMMAND} bench={cfg.get('name')}` (the same overrides work there).")
    result = run_grid(cfg)
    print_summary(result)
    print(ADAPTATION_WARNING)
    return result


def print_summary(result: GridResult) -> None:
    """Print the compact table and where the results are."""
    print()
    print(result.table())
    print()
    bad = {k: v for k, v in result.counts.items() if k != "ok"}
    if bad:
        print("not ok: " + ", ".join(f"{v} {k}" for k, v in sorted(bad.items())) + " (errors listed in the report)")
    if result.report is not None:
        print(f"results: {result.results_csv}")
        print(f"report:  {result.report}")
    print(f"wall time {result.wall_seconds:.0f}s ({result.ran} cells run, {result.reused} reused, "
          f"{result.pending} pending)")


def study_command(cfg, command: Optional[str] = None) -> StudyResult:
    """``adaptkit-study``: run the study, print its table, files and warnings. ``command`` (default: this
    process's arguments) is quoted in ``selection.md``."""
    if command is None and sys.argv and sys.argv[0]:
        command = " ".join([STUDY_COMMAND] + sys.argv[1:])
    study = run_study(cfg, command=command)
    g = study.grid
    print()
    print(study_table(study.summaries) if study.records else
          "no group has two finished candidates yet: nothing to judge")
    print()
    bad = {k: v for k, v in g.counts.items() if k != "ok"}
    if bad:
        print("not ok: " + ", ".join(f"{v} {k}" for k, v in sorted(bad.items())) + f" (see {g.results_csv})")
    if study.markdown is not None:
        print(f"results:   {g.results_csv}")
        print(f"selection: {study.markdown}")
    print(f"wall time {study.wall_seconds:.0f}s ({g.ran} cells run, {g.reused} reused, {g.pending} pending)")
    print(SCORE_WARNING)
    print(ADAPTATION_WARNING)
    return study
