"""Loading a checkpoint never runs code from it, and a checkpoint that does not fit is refused with the reason.

Reference: ``torch.load(weights_only=True)`` restricts unpickling to tensors, primitive types, dicts, lists and
tuples (plus globals explicitly allow-listed with ``torch.serialization.add_safe_globals``); any other global is
refused — PyTorch docs, ``torch.load`` and "weights_only" in the serialization notes. Python's ``pickle`` docs
warn that unpickling untrusted data can execute arbitrary code through ``__reduce__``.
"""
from __future__ import annotations

import builtins
import os
import pickle
import re
import signal

import pytest
import torch
from torch import nn

from adaptkit import fit
from adaptkit.train import loop
from adaptkit.train.loop import Interrupted, load_checkpoint
from tests.conftest import moons_pair


class _Payload:
    """Pickles to "call ``func(*args)``": what a hostile checkpoint would carry."""

    def __init__(self, func, *args):
        self.func, self.args = func, args

    def __reduce__(self):
        return self.func, self.args


def _payloads(marker):
    return {
        "os.system": _Payload(os.system, f"touch {marker}"),
        "builtins.exec": _Payload(builtins.exec, f"open({str(marker)!r}, 'w').close()"),
        "builtins.open": _Payload(builtins.open, str(marker), "w"),
    }


@pytest.mark.parametrize("kind", ["os.system", "builtins.exec", "builtins.open"])
@pytest.mark.parametrize("container", ["torch.save", "raw pickle"])
def test_a_checkpoint_carrying_a_callable_is_refused_and_the_payload_never_runs(tmp_path, kind, container):
    marker = tmp_path / "payload-ran"
    bad = {"format": 1, "step": 3, "model": {"w": torch.zeros(2)}, "extra": _payloads(marker)[kind]}
    path = tmp_path / "checkpoint.pt"
    if container == "torch.save":
        torch.save(bad, path)
    else:
        path.write_bytes(pickle.dumps(bad, protocol=2))
    with pytest.raises(ValueError, match=re.escape(f"refusing to load {path}: it is not a plain-tensor checkpoint")):
        load_checkpoint(path)
    assert not marker.exists()

    # Control: the same file really is hostile — a full unpickle runs the payload.
    if container == "torch.save":
        torch.load(path, weights_only=False)
    else:
        pickle.loads(path.read_bytes())
    assert marker.exists()


def test_resuming_from_a_hostile_checkpoint_refuses_before_running_anything(tmp_path):
    marker = tmp_path / "payload-ran"
    run_dir = tmp_path / "run"
    run_dir.mkdir()
    torch.save({"format": 1, "model": _payloads(marker)["os.system"]}, run_dir / "checkpoint.pt")
    with pytest.raises(ValueError, match="refusing to load .*checkpoint.pt: it is not a plain-tensor checkpoint"):
        fit(moons_pair(n=40), steps=3, batch_size=8, run_dir=run_dir, progress=False, device="cpu")
    assert not marker.exists()


F = loop.CHECKPOINT_FORMAT  # 2 since checkpoints carry integrity digests


@pytest.mark.parametrize("content, msg", [
    (torch.zeros(3), f"is not an adaptkit checkpoint of format {F}; got a Tensor"),
    ({"format": 7}, f"is not an adaptkit checkpoint of format {F}; got format 7"),
    ({"format": 1, "step": 2}, f"is not an adaptkit checkpoint of format {F}; got format 1 (written before "
                               "checkpoints carried integrity digests"),
    ({"format": F, "step": 2}, "lacks the checkpoint entries ['config_hash', 'stage_index', 'model'"),
])
def test_a_plain_but_foreign_checkpoint_is_refused_naming_what_is_wrong(tmp_path, content, msg):
    torch.save(content, tmp_path / "checkpoint.pt")
    with pytest.raises(ValueError, match=re.escape(msg)):
        fit(moons_pair(n=40), steps=3, batch_size=8, run_dir=tmp_path, progress=False, device="cpu")


def test_a_truncated_checkpoint_is_refused(tmp_path):
    pair = moons_pair(n=40)
    fit(pair, steps=3, batch_size=8, run_dir=tmp_path / "a", progress=False, device="cpu")
    blob = (tmp_path / "a" / "checkpoint.pt").read_bytes()
    (tmp_path / "cut.pt").write_bytes(blob[: len(blob) // 2])
    with pytest.raises(ValueError, match="refusing to load .*cut.pt"):
        load_checkpoint(tmp_path / "cut.pt")


def _interrupted_run(run_dir, monkeypatch, **kw):
    """A run stopped (by a real SIGTERM) after 3 of its steps: the folder holds a resumable checkpoint."""
    orig = loop.Trainer._step

    def step(self):
        if self.step == 2:
            os.kill(os.getpid(), signal.SIGTERM)
        orig(self)

    monkeypatch.setattr(loop.Trainer, "_step", step)
    with pytest.raises(Interrupted):
        fit(moons_pair(n=40), batch_size=8, run_dir=run_dir, progress=False, device="cpu", **kw)
    monkeypatch.setattr(loop.Trainer, "_step", orig)


def test_a_checkpoint_of_other_settings_is_refused_naming_the_config_hashes(tmp_path, monkeypatch):
    _interrupted_run(tmp_path, monkeypatch, steps=10, encoder_options={"hidden": [16]})
    recorded = load_checkpoint(tmp_path / "checkpoint.pt")["config_hash"]
    with pytest.raises(ValueError, match=re.escape(f"was written by a run with config hash {recorded!r}, but this "
                                                   "run's config hashes to '") + "[0-9a-f]{16}" +
                       re.escape("': the settings differ")):
        fit(moons_pair(n=40), steps=10, batch_size=8, encoder_options={"hidden": [32]}, run_dir=tmp_path,
            progress=False, device="cpu")


def test_a_checkpoint_of_another_architecture_is_refused_naming_the_tensor(tmp_path, monkeypatch):
    # Own modules are named by class in the config, so widths do not change the hash; the state dict catches it.
    def parts(width):
        torch.manual_seed(0)
        return dict(encoder=nn.Sequential(nn.Linear(2, width), nn.ReLU()), head=nn.Linear(width, 2))

    _interrupted_run(tmp_path, monkeypatch, steps=10, **parts(8))
    with pytest.raises(ValueError, match="(?s)" + re.escape("checkpoint.pt does not fit this model/method: ") +
                       r".*size mismatch for encoder\.0\.weight"):
        fit(moons_pair(n=40), steps=10, batch_size=8, run_dir=tmp_path, progress=False, device="cpu", **parts(12))


def test_a_config_mismatch_names_the_settings_that_differ(tmp_path):
    """When the run's resolved config travels in ``meta["config"]`` the refusal lists the differing keys."""
    from adaptkit.data.batches import PairedBatches
    from adaptkit.methods import SetupInfo, build_method
    from adaptkit.nets import AdaptedModel
    import hashlib

    from adaptkit.plain import canonical_json
    from adaptkit.train.loop import Trainer
    from adaptkit.train.optim import OptimSettings

    def config_hash(config):
        return hashlib.sha256(canonical_json(config).encode()).hexdigest()[:16]

    pair = moons_pair(n=40)

    def trainer(config):
        torch.manual_seed(0)
        model = AdaptedModel(nn.Sequential(nn.Linear(2, 4), nn.ReLU()), nn.Linear(4, 2), 4, 2)
        method = build_method("source_only")
        method.attach(model, SetupInfo(feature_dim=4, n_classes=2, input_shape=(2,), batch_size=8, steps=4))
        return Trainer(model, method, PairedBatches(pair.training_data(), 8, 0), steps=4, optim=OptimSettings(),
                       evaluate=lambda m: {}, run_dir=tmp_path, progress=False,
                       meta={"method": "source_only", "config": config, "config_hash": config_hash(config)})

    a = trainer({"steps": 4, "optim": {"lr": 0.01, "name": "sgd"}, "seed": 0})
    a.run()
    b = trainer({"steps": 4, "optim": {"lr": 0.1, "name": "sgd"}, "seed": 0, "select": "score/dev"})
    with pytest.raises(ValueError, match=re.escape("the settings differ (optim.lr: 0.01 -> 0.1; select: '<absent>' "
                                                   "-> 'score/dev')")):
        b.load_state_dict(load_checkpoint(tmp_path / "checkpoint.pt"), source="ck")
