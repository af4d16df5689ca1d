"""The post-training phase: the steps a run takes after its last training step (label-shift estimate,
diagnostics, plots), each recorded in ``summary["post_training"]`` as it completes, so that a rerun completes what
is still owed from the final checkpoint without training (:func:`adaptkit.run.complete`)."""
from __future__ import annotations

from pathlib import Path
from typing import Any, Dict, List, Mapping, Union

from .config import RunConfig
from .data.streaming import DatasetPair

__all__ = ["POST_TRAINING", "PENDING", "DONE", "OFF", "post_training_plan", "unfinished_steps",
           "post_training_step", "label_shift_estimate"]

POST_TRAINING = ("label_shift", "diagnostics", "plots")  # in the order they run
PENDING, DONE, OFF = "pending", "done", "off"  # a step's state in summary["post_training"]


def post_training_plan(c: RunConfig) -> Dict[str, str]:
    """The post-training steps a resolved config asks for, all ``pending`` (``off``: not asked): the label-shift
    estimate always; the diagnostics with ``diagnostics=true`` (default: with a run_dir); the plots with the
    diagnostics of a run that has a folder to put them in."""
    diagnostics = c.diagnostics if c.diagnostics is not None else c.run_dir is not None
    return {"label_shift": PENDING, "diagnostics": PENDING if diagnostics else OFF,
            "plots": PENDING if diagnostics and c.run_dir is not None else OFF}


def step_files(step: str) -> tuple:
    """The files a post-training step leaves in the run folder (relative paths)."""
    from .measure.runs import DIAGNOSTICS, PLOTS

    return {"diagnostics": (DIAGNOSTICS,), "plots": tuple(f"plots/{n}" for n in PLOTS)}.get(step, ())


def unfinished_steps(run_dir: Union[str, Path], summary: Mapping[str, Any]) -> List[str]:
    """The post-training steps a finished run's ``summary`` still owes: those recorded ``pending``, and those
    recorded ``done`` whose files are gone from ``run_dir``. A summary written before the phase was recorded (no
    ``post_training``) owes nothing."""
    plan = summary.get("post_training")
    if not isinstance(plan, Mapping):
        return []
    rd = Path(run_dir)
    return [step for step in POST_TRAINING
            if plan.get(step) == PENDING
            or (plan.get(step) == DONE and not all((rd / f).is_file() for f in step_files(step)))]


def post_training_step(step: str, run, c: RunConfig) -> None:
    """One step of the post-training phase; its result goes into ``run.summary`` and, for the diagnostics and the
    plots, files in the run folder (each written atomically). A DatasetPair's steps use its first samples in memory."""
    if isinstance(run.data, DatasetPair):
        import dataclasses

        run = dataclasses.replace(run, data=run.data.in_memory_sample())  # the same summary dict
    if step == "label_shift":
        run.summary["label_shift"] = label_shift_estimate(run, seed=c.seed)
    elif step == "diagnostics":
        from .measure.runs import diagnose

        run.summary["diagnostics"] = diagnose(run, seed=c.seed, plots=False)
    elif step == "plots":
        from .measure.runs import draw_plots

        draw_plots(run, seed=c.seed, plots=True)
    else:  # pragma: no cover — POST_TRAINING lists every step
        raise AssertionError(step)


def label_shift_estimate(run, seed: int = 0) -> Dict[str, Any]:
    """The run's estimate of the target class proportions (:mod:`adaptkit.trust.reference`): from its own model
    when the method trains on the source alone, else from the reference black box on the inputs."""
    from .trust import reference

    m = run.method
    if not m.uses_target_data and not m.uses_target_labels and not m.target_terms:
        pair = run.data
        return reference.from_outputs(run.predict_proba(pair.source_val.x, domain="source"), pair.source_val.y.numpy(),
                                      run.predict_proba(pair.target_train_x), "this run's source-only model", seed=seed)
    return reference.from_inputs(run.data, seed=seed)
