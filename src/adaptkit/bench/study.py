"""The selection study: how well does each label-free selection score choose among hyper-parameter candidates?

It plans a grid whose ``sweep`` expands every method into candidates (:func:`adaptkit.bench.plan.expand_sweep`),
trains them with the grid's machinery — worker processes, resume, fault isolation, ``results.csv``
(:func:`adaptkit.bench.grid.execute`) —, judges every score on every group of candidates (:mod:`.judge`, where
the numbers are defined) and writes ``selection.md`` and ``selection.csv`` (:func:`adaptkit.bench.report.
write_study`). Every cell records every score at its final evaluation (``score/<name>`` in the summary's ``final``
record); the candidate is the model after its last step. The grid's own ``report.md`` is not written for a study
(dozens of candidates per shift make it unreadable); ``results.csv`` holds every cell's accuracy and scores.

**Command line.** ``adaptkit-study`` runs the shipped study (``configs/bench/selection.yaml``) by default; every
bench key can be overridden, and a rerun resumes::

    adaptkit-study workers=2
    adaptkit-study sweep.weight=[0.3,3] sweep.lr=[0.001] seeds=[0] out_dir=runs/sel_small

Hydra *merges* a ``sweep`` given on the command line into the config's, key by key: change one with
``sweep.lr=[0.001]``, remove one with ``~sweep.adapt_lr``, add one with ``+sweep.gamma=[5,10]`` (from Python,
``sweep={...}`` replaces the whole sweep). A sweep key that is an option of no method of the grid is skipped for
every method; one that is no registered method's option at all is refused as a typo.

Example:
    >>> from adaptkit.bench.study import run_study
    >>> study = run_study("selection", workers=2, seeds=[0])  # doctest: +SKIP
    >>> from adaptkit.bench.report import study_table
    >>> print(study_table(study.summaries))  # doctest: +SKIP
"""
from __future__ import annotations

import time
from typing import Any, Optional

from .config import load_config
from .grid import execute, lock_grid
from .judge import ORACLE, RANDOM, RULE_PREFIX, RULES, StudyResult, analyse, group_rows, summarise
from .plan import plan_grid
from .report import write_study

__all__ = ["run_study"]


def run_study(config: Any = "selection", *, command: Optional[str] = None, **overrides) -> StudyResult:
    """Train every candidate of a sweep (resuming), judge every score, write ``selection.md``/``selection.csv``.

    ``config``: a named bench grid with a sweep (default ``"selection"``: ``configs/bench/selection.yaml``), or a
    composed config / mapping; keyword ``overrides`` set bench keys as for :func:`adaptkit.bench.grid.run_grid`
    (``seeds=[0]``, ``workers=2``, ``out_dir=...``); ``sweep={...}`` *replaces* the config's sweep (on the command
    line hydra merges: set keys one by one, ``sweep.lr=[0.001]``). With ``scores`` empty every
    score of :data:`adaptkit.select.SCORES` is recorded. ``command`` is quoted in ``selection.md``.
    """
    from ..select import SCORES

    t0 = time.perf_counter()
    c = load_config(config, overrides)
    if not c["sweep"]:
        raise ValueError("A selection study needs a sweep: set `sweep` in the bench config, e.g. "
                         "sweep={weight: [0.3, 1.0, 3.0], lr: [0.0003, 0.001]} (keys: 'lr' or method options).")
    if not c["scores"]:
        c["scores"] = list(SCORES)
    plan = plan_grid(c)
    if not any(len([k for k in plan.candidates if k.base == b]) > 1 for b in {k.base for k in plan.candidates}):
        raise ValueError(f"The sweep {c['sweep']!r} gives every method a single candidate: there is nothing to "
                         "choose between. Sweep 'lr' or an option the methods have (e.g. weight).")
    with lock_grid(plan):  # one writer of the study's folder, from the cells to selection.md
        grid = execute(plan, write_report=False, lock=False)
        groups, counts = group_rows(grid.rows, plan.candidates, plan.scores)
        records = analyse(groups, plan.scores)
        summaries = summarise(records, list(plan.scores) + [RULE_PREFIX + r for r in RULES] + [RANDOM, ORACLE])
        study = StudyResult(grid=grid, candidates=list(plan.candidates), groups=groups, records=records,
                            summaries=summaries, counts=counts, markdown=None, csv=None,
                            wall_seconds=time.perf_counter() - t0)
        if records:
            study.markdown, study.csv = write_study(study, plan.out_dir, command=command)
    return study
