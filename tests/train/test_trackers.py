"""Trackers (adaptkit.train.trackers): a tiny run logged to TensorBoard and MLflow, read back with each package's
own reader (tensorboard's EventAccumulator, mlflow's MlflowClient) and compared with the run's own history."""
from __future__ import annotations

import os

import pytest

from adaptkit import fit
from adaptkit.train import loop
from adaptkit.train.trackers import check_tracking

KW = dict(method="dann", steps=20, batch_size=16, eval_every=5, seed=3, progress=False, device="cpu")


def _pair():
    from tests.conftest import moons_pair

    return moons_pair(n=80)


def _numbers(record):
    return {k: v for k, v in record.items() if k != "step" and isinstance(v, float)}


def _tensorboard(folder):
    ea_mod = pytest.importorskip("tensorboard.backend.event_processing.event_accumulator")
    ea = ea_mod.EventAccumulator(str(folder), size_guidance={"scalars": 0, "images": 0, "tensors": 0})
    ea.Reload()
    return ea


def _mlflow_client(uri, monkeypatch):
    pytest.importorskip("mlflow")
    from mlflow.tracking import MlflowClient

    monkeypatch.setenv("MLFLOW_ALLOW_FILE_STORE", "true")  # MLflow 3 opens a file store only when allowed
    return MlflowClient(tracking_uri=uri)


def test_tensorboard_holds_every_record_of_the_history_and_the_pictures(tmp_path):
    pytest.importorskip("tensorboard")
    run = fit(_pair(), run_dir=tmp_path / "run", track=["tensorboard"], diagnostics=True, **KW)
    ea = _tensorboard(tmp_path / "run" / "tensorboard")
    tags = ea.Tags()
    for key in _numbers(run.history[0]):
        got = [(e.step, e.value) for e in ea.Scalars(key)]
        want = [(r["step"], r[key]) for r in run.history]
        assert [s for s, _ in got] == [s for s, _ in want]  # each evaluation once, at its step
        # TensorBoard stores scalars as float32: equal to the history within float32 rounding (numpy's eps)
        assert [v for _, v in got] == pytest.approx([v for _, v in want], rel=1.2e-7, abs=1e-30)
    assert ea.Scalars("target_accuracy")[-1].value == pytest.approx(run.summary["target_accuracy"], rel=1.2e-7)
    assert {"plots/features", "plots/learning_curves"} <= set(tags["images"])
    img = ea.Images("plots/features")[0]
    assert img.step == 20 and img.width > 100 and img.height > 100
    assert "config" in "".join(tags.get("tensors", []))  # add_text is stored as a text tensor


def test_mlflow_holds_metrics_params_config_and_pictures(tmp_path, monkeypatch):
    pytest.importorskip("mlflow")
    rd = tmp_path / "run"
    run = fit(_pair(), run_dir=rd, track=["mlflow"], diagnostics=True, **KW)
    client = _mlflow_client((rd / "mlruns").resolve().as_uri(), monkeypatch)
    (found,) = client.search_runs([client.get_experiment_by_name("adaptkit").experiment_id])
    assert found.info.status == "FINISHED" and found.info.run_name == "run"
    for key in _numbers(run.history[0]):
        got = [(m.step, m.value) for m in client.get_metric_history(found.info.run_id, key)]
        assert sorted(got) == [(r["step"], r[key]) for r in run.history]  # MLflow keeps doubles: exact
    assert found.data.params["method.name"] == "dann" and found.data.params["steps"] == "20"
    assert "run_dir" not in found.data.params  # where the run is kept is not a parameter of its numbers
    arts = {a.path for a in client.list_artifacts(found.info.run_id)}
    assert {"run_config.yaml", "run_summary.json", "plots"} <= arts
    assert {a.path for a in client.list_artifacts(found.info.run_id, "plots")} == {
        "plots/features.png", "plots/learning_curves.png"}


def test_a_resumed_run_continues_the_same_tracker_runs_without_duplicated_steps(tmp_path, monkeypatch):
    """A crash after the records of steps 5, 10 and 15 were logged, with the last checkpoint at step 10: the
    resumed run recomputes step 15 and must not log it twice (TensorBoard: purged and rewritten; MLflow: skipped)."""
    pytest.importorskip("tensorboard")
    pytest.importorskip("mlflow")
    uri = (tmp_path / "store").resolve().as_uri()
    kw = dict(KW, checkpoint_every=10, track=["mlflow", "tensorboard"], track_uri=uri, diagnostics=False)
    ref = fit(_pair(), run_dir=tmp_path / "ref", **{**kw, "track": [], "track_uri": None})
    orig = loop.Trainer._step

    def crash_at_17(self):
        if self.step == 17:
            raise RuntimeError("simulated crash")
        orig(self)

    monkeypatch.setattr(loop.Trainer, "_step", crash_at_17)
    rd = tmp_path / "run"
    with pytest.raises(RuntimeError, match="simulated crash"):
        fit(_pair(), run_dir=rd, **kw)
    monkeypatch.setattr(loop.Trainer, "_step", orig)
    client = _mlflow_client(uri, monkeypatch)
    exp = client.get_experiment_by_name("adaptkit").experiment_id
    assert [r.info.status for r in client.search_runs([exp])] == ["FAILED"]
    assert [m.step for m in client.get_metric_history(client.search_runs([exp])[0].info.run_id, "wall_seconds")] \
        == [5, 10, 15]
    run = fit(_pair(), run_dir=rd, **kw)
    assert [r["target_accuracy"] for r in run.history] == [r["target_accuracy"] for r in ref.history]  # CPU resume
    (found,) = client.search_runs([exp])  # the same MLflow run, not a second one
    assert found.info.status == "FINISHED"
    got = sorted((m.step, m.value) for m in client.get_metric_history(found.info.run_id, "target_accuracy"))
    assert got == [(r["step"], r["target_accuracy"]) for r in ref.history]
    ea = _tensorboard(rd / "tensorboard")
    assert [e.step for e in ea.Scalars("target_accuracy")] == [5, 10, 15, 20]
    assert [e.value for e in ea.Scalars("target_accuracy")] == pytest.approx(
        [r["target_accuracy"] for r in ref.history], rel=1.2e-7)


def test_tracking_settings_are_checked_and_do_not_change_the_config_hash(tmp_path):
    from adaptkit.config import RunConfig, config_hash, resolve

    with pytest.raises(ValueError, match=r"must list trackers among \['mlflow', 'tensorboard'\]. Got 'wandb'"):
        check_tracking(["wandb"], None, "x")
    with pytest.raises(TypeError, match="must be a list of trackers"):
        check_tracking("tensorboard", None, "x")
    with pytest.raises(ValueError, match=r"track=\['tensorboard'\] needs a run_dir"):
        fit(_pair(), track=["tensorboard"], **{**KW, "steps": 1})
    with pytest.raises(ValueError, match="add mlflow to track"):
        check_tracking([], "sqlite:///x.db", None)
    if pytest.importorskip("tensorboard"):
        a = resolve(RunConfig(method="coral", run_dir=str(tmp_path)))
        b = resolve(RunConfig(method="coral", run_dir=str(tmp_path), track=["tensorboard"]))
        assert config_hash(a) == config_hash(b)


def test_a_missing_package_names_the_extra_to_install(monkeypatch):
    import importlib.util

    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec", lambda name, *a: None if name == "mlflow" else real(name, *a))
    with pytest.raises(ValueError, match=r"needs the mlflow package, which is not installed: pip install "
                                         r"'adaptkit\[mlflow\]'"):
        check_tracking(["mlflow"], "sqlite:///x.db", None)


def test_a_run_that_does_not_track_imports_no_tracker_and_writes_no_tracker_file(tmp_path, monkeypatch):
    import sys

    for name in ("mlflow", "mlflow.tracking", "tensorboard", "torch.utils.tensorboard"):
        monkeypatch.setitem(sys.modules, name, None)  # any import of them now raises ImportError
    fit(_pair(), run_dir=tmp_path / "r", diagnostics=False, **KW)
    assert not {"tensorboard", "mlruns", "tracking.json"} & {p.name for p in (tmp_path / "r").iterdir()}
