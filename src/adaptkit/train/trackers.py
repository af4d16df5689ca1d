"""Send a run's metrics, resolved config and pictures to the trackers practitioners already use: TensorBoard
(torch's own ``torch.utils.tensorboard.SummaryWriter``) and MLflow (``MlflowClient``), when a run asks with
``track=[tensorboard, mlflow]``. Both are optional extras (``pip install 'adaptkit[tensorboard]'``,
``'adaptkit[mlflow]'``); a run that does not ask imports neither and pays one ``if`` per evaluation.

What goes where (``<run_dir>`` is the run folder):

* every evaluation record of the loop (``metrics.jsonl``: losses averaged since the last evaluation, accuracies,
  label-free scores, ``wall_seconds``) as scalars at the record's ``step``; text values (the stage) are left out;
* the resolved config: TensorBoard text ``config`` at step 0; MLflow params (the settings that change a run's
  numbers, flattened: ``method.name``, ``optim.lr`` ...) and the artifact ``run_config.yaml``;
* after the post-training phase, the pictures ``plots/*.png`` (TensorBoard images ``plots/<name>`` at the last
  step; MLflow artifacts under ``plots/``) and, for MLflow, ``run_summary.json``; the MLflow run is then ``FINISHED``
  (``KILLED`` when interrupted, ``FAILED`` on an error).

Where: TensorBoard writes ``<run_dir>/tensorboard`` (``tensorboard --logdir runs/`` shows every run folder
under ``runs/``). MLflow writes to ``track_uri`` when set (``sqlite:///path/mlflow.db``, ``http://host:5000``,
``file:///path/mlruns`` — one store for a whole sweep), else to a file store ``<run_dir>/mlruns``. MLflow 3 keeps
its file store in "maintenance mode" and refuses to open one unless ``MLFLOW_ALLOW_FILE_STORE=true``; adaptkit
sets that variable only while it opens the default store (to read it: ``MLFLOW_ALLOW_FILE_STORE=true mlflow ui
--backend-store-uri <run_dir>/mlruns``). The experiment is ``adaptkit``; the run is named after the run folder.

A resumed run continues the same tracker run without duplicated steps. TensorBoard: a new event file is opened
with ``purge_step=0``, which makes TensorBoard's readers drop every earlier event of the folder, and the whole
history held by the checkpoint is written again (bit-identical on the CPU), then training continues. MLflow: the
run id is kept in ``<run_dir>/tracking.json`` with the config hash; a resumed run reopens that run, logs only the
records after the last step MLflow holds, and never re-logs params. ``overwrite=true`` or another config hash
starts a new MLflow run. A guarded run (``guard=true``, ``weight=auto``) logs the run it keeps once it is saved.
A tracker error (a server that cannot be reached) stops the run like any other error; rerun to resume.
"""
from __future__ import annotations

import contextlib
import importlib.util
import math
import os
from pathlib import Path
from typing import Any, Dict, Iterable, List, Mapping, Optional

TRACKERS = ("mlflow", "tensorboard")  # the values `track` accepts
EXTRA = {"tensorboard": ("tensorboard", "tensorboard"), "mlflow": ("mlflow", "mlflow")}  # name: (module, extra)
TENSORBOARD_DIR = "tensorboard"  # under the run folder
MLFLOW_DIR = "mlruns"  # the default MLflow file store, under the run folder
RECORD = "tracking.json"  # the MLflow run id and config hash a resumed run continues
EXPERIMENT = "adaptkit"


def check_tracking(track: Any, track_uri: Any, run_dir: Any, owner: str = "the run settings") -> List[str]:
    """Check the ``track`` and ``track_uri`` settings without importing any tracker; returns ``track`` as a
    sorted list of unique names. A tracker whose package is missing is refused naming the extra to install.

    Example:
        >>> check_tracking([], None, None)
        []
    """
    if isinstance(track, (str, bytes)) or not hasattr(track, "__iter__"):
        raise TypeError(f"The 'track' parameter of {owner} must be a list of trackers among {list(TRACKERS)}, e.g. "
                        f"[tensorboard]. Got {track!r} instead.")
    names = sorted(set(track))
    for name in names:
        if name not in TRACKERS:
            raise ValueError(f"The 'track' parameter of {owner} must list trackers among {list(TRACKERS)}. Got "
                             f"{name!r} instead.")
        module, extra = EXTRA[name]
        if importlib.util.find_spec(module) is None:
            raise ValueError(f"track=[{name}] needs the {module} package, which is not installed: "
                             f"pip install 'adaptkit[{extra}]'.")
    if track_uri is not None and not isinstance(track_uri, str):
        raise TypeError(f"The 'track_uri' parameter of {owner} must be an MLflow tracking URI (a string) or null. "
                        f"Got {track_uri!r} instead.")
    if track_uri is not None and "mlflow" not in names:
        raise ValueError(f"track_uri={track_uri!r} is an MLflow tracking URI: add mlflow to track (track=[mlflow]).")
    return names


def _check_folder(names: List[str], track_uri: Optional[str], run_dir: Any) -> None:
    """Refuse tracking that writes into a run folder when the run has none (checked when the run starts, not with
    the settings: the CLI's run folder is hydra's, set after the settings are checked)."""
    if run_dir is None and ("tensorboard" in names or ("mlflow" in names and track_uri is None)):
        need = "tensorboard" if "tensorboard" in names else "mlflow without a track_uri"
        raise ValueError(f"track={names} needs a run_dir: {need} writes into the run folder (pass run_dir, or "
                         "for mlflow alone a track_uri).")


def scalars(record: Mapping[str, Any]) -> Dict[str, float]:
    """The numbers of an evaluation record a tracker logs: finite ints and floats, ``step`` left out (it is the
    x axis) and text (the stage) too."""
    return {k: float(v) for k, v in record.items()
            if k != "step" and isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)}


def _flat(d: Mapping[str, Any], prefix: str = "") -> Dict[str, str]:
    out: Dict[str, str] = {}
    for k, v in d.items():
        if isinstance(v, Mapping) and v:
            out.update(_flat(v, f"{prefix}{k}."))
        else:
            out[f"{prefix}{k}"] = str(v)
    return out


class TensorBoardTracker:
    """Scalars, config text and images into ``<run_dir>/tensorboard`` through torch's ``SummaryWriter``."""

    def __init__(self, run_dir: Path, **_):
        try:
            from torch.utils.tensorboard import SummaryWriter
        except ImportError as e:  # pragma: no cover — check_tracking found the package
            raise ImportError(f"track=[tensorboard] cannot import torch's TensorBoard writer ({e}): "
                              "pip install 'adaptkit[tensorboard]'.") from None
        folder = Path(run_dir) / TENSORBOARD_DIR
        earlier = folder.is_dir() and any(folder.glob("events.out.tfevents.*"))
        # purge_step=0: TensorBoard's readers drop every event written before this file (a resumed run writes its
        # whole history again), so no step appears twice
        self.writer = SummaryWriter(str(folder), purge_step=0 if earlier else None)
        self.resumed = earlier

    def log_config(self, plain: Mapping[str, Any], hashed: Mapping[str, Any]) -> None:
        from omegaconf import OmegaConf

        self.writer.add_text("config", "```\n" + OmegaConf.to_yaml(OmegaConf.create(dict(plain))) + "```", 0)

    def log_records(self, records: Iterable[Mapping[str, Any]]) -> None:
        for r in records:
            for k, v in scalars(r).items():
                self.writer.add_scalar(k, v, int(r["step"]))
        self.writer.flush()

    def log_finish(self, pictures: List[Path], summary: Mapping[str, Any], step: int) -> None:
        import matplotlib.image

        for png in pictures:
            img = matplotlib.image.imread(str(png))  # H x W x (3|4), floats in [0, 1]
            self.writer.add_image(f"plots/{png.stem}", img[..., :3], step, dataformats="HWC")
        self.writer.flush()

    def close(self, status: str) -> None:
        self.writer.close()


@contextlib.contextmanager
def _file_store_allowed(uri: str):
    """MLflow 3 refuses to open a file store unless MLFLOW_ALLOW_FILE_STORE=true: set while the default store is
    opened (the store is cached by URI afterwards), unless the user set the variable."""
    if not uri.startswith("file:") or "MLFLOW_ALLOW_FILE_STORE" in os.environ:
        yield
        return
    os.environ["MLFLOW_ALLOW_FILE_STORE"] = "true"
    try:
        yield
    finally:
        os.environ.pop("MLFLOW_ALLOW_FILE_STORE", None)


class MlflowTracker:
    """Metrics, params, config and pictures into one MLflow run, through ``MlflowClient`` (no global state)."""

    def __init__(self, run_dir: Optional[Path], uri: Optional[str], config_hash: str, name: str, fresh: bool):
        try:
            from mlflow.tracking import MlflowClient
        except ImportError as e:  # pragma: no cover — check_tracking found the package
            raise ImportError(f"track=[mlflow] cannot import mlflow ({e}): pip install 'adaptkit[mlflow]'.") from None
        self.uri = uri or (Path(run_dir).resolve() / MLFLOW_DIR).as_uri()
        self.record = Path(run_dir) / RECORD if run_dir is not None else None
        with _file_store_allowed(self.uri):
            self.client = MlflowClient(tracking_uri=self.uri)
            self.client._tracking_client.store  # open (and cache) the store now, while it is allowed
        self.run_id, self.last_step = self._reopen(config_hash) if not fresh else (None, -1)
        self.resumed = self.run_id is not None
        if self.run_id is None:
            exp = self.client.get_experiment_by_name(EXPERIMENT)
            exp_id = exp.experiment_id if exp is not None else self.client.create_experiment(EXPERIMENT)
            tags = {"adaptkit.config_hash": config_hash}
            if run_dir is not None:
                tags["adaptkit.run_dir"] = str(Path(run_dir).resolve())
            self.run_id = self.client.create_run(exp_id, run_name=name, tags=tags).info.run_id
            if self.record is not None:
                from . import files

                files.write_json(self.record, {"mlflow": {"uri": self.uri, "run_id": self.run_id,
                                                          "config_hash": config_hash}})
        else:
            self.client.update_run(self.run_id, status="RUNNING")

    def _reopen(self, config_hash: str):
        """``(run id, last logged step)`` of the MLflow run this folder recorded for the same store and config, or
        ``(None, -1)``."""
        import json

        if self.record is None or not self.record.is_file():
            return None, -1
        try:
            rec = json.loads(self.record.read_text(encoding="utf-8")).get("mlflow") or {}
        except ValueError:
            return None, -1
        if rec.get("uri") != self.uri or rec.get("config_hash") != config_hash:
            return None, -1
        from mlflow.exceptions import MlflowException

        try:
            self.client.get_run(rec["run_id"])
        except MlflowException:  # the store was emptied: a new run
            return None, -1
        steps = [m.step for m in self.client.get_metric_history(rec["run_id"], "wall_seconds")]
        return rec["run_id"], max(steps, default=-1)

    def log_config(self, plain: Mapping[str, Any], hashed: Mapping[str, Any]) -> None:
        from mlflow.entities import Param

        if self.resumed:  # params are write-once in MLflow, and were logged when the run began
            return
        params = [Param(k, v[:6000]) for k, v in sorted(_flat(hashed).items())]
        for i in range(0, len(params), 100):  # log_batch takes at most 100 params at a time
            self.client.log_batch(self.run_id, params=params[i:i + 100])
        self.client.log_dict(self.run_id, dict(plain), "run_config.yaml")  # not config.yaml: adaptkit-runs finds run folders by that name

    def log_records(self, records: Iterable[Mapping[str, Any]]) -> None:
        import time

        from mlflow.entities import Metric

        now = int(time.time() * 1000)
        metrics = [Metric(k, v, now, int(r["step"])) for r in records if int(r["step"]) > self.last_step
                   for k, v in scalars(r).items()]
        for i in range(0, len(metrics), 1000):  # log_batch's limit on metrics per call
            self.client.log_batch(self.run_id, metrics=metrics[i:i + 1000])
        if metrics:
            self.last_step = max(m.step for m in metrics)

    def log_finish(self, pictures: List[Path], summary: Mapping[str, Any], step: int) -> None:
        for png in pictures:
            self.client.log_artifact(self.run_id, str(png), "plots")
        from ..plain import to_plain

        self.client.log_dict(self.run_id, to_plain(dict(summary)), "run_summary.json")

    def close(self, status: str) -> None:
        self.client.set_terminated(self.run_id, {"finished": "FINISHED", "interrupted": "KILLED"}.get(status, "FAILED"))


class Tracking:
    """The trackers of one run: what :func:`tracked` yields. ``finish(run)`` logs the pictures and the summary."""

    def __init__(self, trackers: List[Any], run_dir: Optional[Path]):
        self.trackers, self.run_dir = trackers, run_dir

    def log_record(self, record: Mapping[str, Any]) -> None:
        for t in self.trackers:
            t.log_records([record])

    def finish(self, run) -> None:
        pictures = sorted((self.run_dir / "plots").glob("*.png")) if self.run_dir is not None else []
        step = int(run.summary.get("steps") or 0)
        for t in self.trackers:
            t.log_finish(pictures, run.summary, step)


def open_trackers(c, history: List[Mapping[str, Any]], config_hash: str, plain: Mapping[str, Any],
                  hashed: Mapping[str, Any]) -> Optional[Tracking]:
    """The trackers a resolved config ``c`` asks for, each opened and given the config (``plain``: every setting;
    ``hashed``: those that change the numbers, MLflow's params) and ``history`` so far; ``None`` when ``c.track`` is
    empty. (The config module's helpers are passed in: this module sits below it.)"""
    if not c.track:
        return None
    _check_folder(c.track, c.track_uri, c.run_dir)
    rd = Path(c.run_dir) if c.run_dir is not None else None
    data = c.data.get("name") if isinstance(c.data, Mapping) else c.data
    method = c.method.get("name") if isinstance(c.method, Mapping) else c.method
    name = rd.name if rd is not None else f"{data}-{method}-seed{c.seed}"
    out: List[Any] = []
    try:
        for t in c.track:
            if t == "tensorboard":
                out.append(TensorBoardTracker(rd))
            else:
                out.append(MlflowTracker(rd, c.track_uri, config_hash, name, fresh=c.overwrite))
            out[-1].log_config(plain, hashed)
            out[-1].log_records(history)
    except BaseException:
        for t in out:
            t.close("failed")
        raise
    return Tracking(out, rd)


@contextlib.contextmanager
def tracked(c, trainer, plain: Mapping[str, Any], interrupted: tuple = (KeyboardInterrupt,)):
    """Feed ``trainer``'s evaluation records to the trackers ``c.track`` names while the block runs; the block
    calls ``finish(run)`` at its end. ``plain``: the config as plain values; an exception among ``interrupted``
    marks the tracker run interrupted (MLflow ``KILLED``), any other failed. Yields a :class:`Tracking` (a no-op
    one when nothing is tracked: the trainer is then left untouched)."""
    tracking = open_trackers(c, trainer.history, trainer.meta["config_hash"], plain, trainer.meta["config"])
    if tracking is None:
        yield Tracking([], None)
        return
    trainer.on_record = tracking.log_record
    status = "failed"
    try:
        yield tracking
        status = "finished"
    except BaseException as e:
        status = "interrupted" if isinstance(e, interrupted) else "failed"
        raise
    finally:
        trainer.on_record = None
        for t in tracking.trackers:
            t.close(status)


def track_finished(c, run, plain: Mapping[str, Any], hashed: Mapping[str, Any]) -> None:
    """Log a run trained apart from its folder (a guarded run, once saved): its history, config and pictures."""
    tracking = open_trackers(c, run.history, run.summary["config_hash"], plain, hashed)
    if tracking is None:
        return
    try:
        tracking.finish(run)
    finally:
        for t in tracking.trackers:
            t.close("finished")
