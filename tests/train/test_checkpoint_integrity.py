"""A checkpoint proves its integrity: a changed bit is refused naming the tensor or field, and a value that this run
could not have written is refused naming the field, the value and the accepted range.

References: SHA-256 (FIPS 180-4, through Python's ``hashlib``) for the digests; IEEE 754 binary32 layout (sign bit
31, exponent bits 30-23, little-endian in the file) for the exponent flip; ``torch.save`` writes each tensor's
storage uncompressed into the zip archive, so the tensor's bytes can be found and changed in the file.
"""
from __future__ import annotations

import re

import numpy as np
import pytest
import torch

from adaptkit.data.batches import PairedBatches
from adaptkit.methods import SetupInfo, build_method
from adaptkit.nets import AdaptedModel, MLPEncoder, MLPHead
from adaptkit.train.evaluate import Evaluator
from adaptkit.train.loop import Trainer, checkpoint_digests, load_checkpoint, tensor_digest
from adaptkit.train.optim import OptimSettings
from tests.conftest import moons_pair

NAME = "model.encoder.net.1.weight"  # the first Linear of the MLP encoder (net.0 is the Flatten)


def _trainer(run_dir=None, method="adda", steps=10, seed=0):
    pair = moons_pair(n=40)
    torch.manual_seed(seed)
    m = build_method(method)
    model = AdaptedModel(MLPEncoder(pair.input_shape, hidden=[8], features=4), MLPHead(4, 2, hidden=[8]), 4, 2)
    m.attach(model, SetupInfo(4, 2, pair.input_shape, batch_size=8, steps=steps))
    return Trainer(model, m, PairedBatches(pair.training_data(), 8, seed), steps=steps, optim=OptimSettings(lr=0.05),
                   evaluate=Evaluator(pair.scoring_sets(), pair.target_train_x), eval_every=3, run_dir=run_dir,
                   meta={"config_hash": "x"}, handle_signals=False, progress=False)


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    """A run of 7 of 10 steps (adda: pretrain stage [0, 5), adapt [5, 10)) and its checkpoint."""
    rd = tmp_path_factory.mktemp("run")
    tr = _trainer(rd)
    tr.steps = 7
    tr.run()
    return rd / "checkpoint.pt"


def _resume(path):
    """A fresh trainer restored from ``path`` (raises what loading refuses)."""
    tr = _trainer()
    tr.load_state_dict(load_checkpoint(path), source=str(path))
    return tr


def test_an_intact_checkpoint_resumes_and_its_digests_are_sha256_of_the_bytes(saved):
    _resume(saved)
    ck = load_checkpoint(saved)
    w = ck["model"][NAME.removeprefix("model.")]
    assert ck["digests"]["tensors"][NAME] == tensor_digest(w)
    import hashlib  # the outside reference: SHA-256 of dtype, shape and the row-major bytes

    want = hashlib.sha256(f"{w.dtype} {tuple(w.shape)} ".encode() + w.numpy().tobytes()).hexdigest()
    assert tensor_digest(w) == want


def _flip_in_file(src, dst, name, byte, mask):
    """Copy ``src`` to ``dst`` with one bit of the tensor ``name`` flipped in the file itself: XOR ``mask`` into
    byte ``byte`` of its first element's stored bytes. Returns the tensor before and after, as loaded."""
    ck = load_checkpoint(src)
    t = ck["model"][name.removeprefix("model.")]
    blob, raw = bytearray(src.read_bytes()), t.numpy().tobytes()
    at = blob.find(raw)
    assert at >= 0 and blob.find(raw, at + 1) < 0, "the tensor's bytes must occur once in the file"
    blob[at + byte] ^= mask
    dst.write_bytes(bytes(blob))
    return t, load_checkpoint(dst)["model"][name.removeprefix("model.")]


@pytest.mark.parametrize("byte, mask, what", [(0, 0x01, "lowest mantissa bit"), (3, 0x40, "top exponent bit")])
def test_one_flipped_bit_in_a_stored_tensor_is_refused_naming_the_tensor(saved, tmp_path, byte, mask, what):
    before, after = _flip_in_file(saved, tmp_path / "checkpoint.pt", NAME, byte, mask)
    # control: the file still loads (torch does not notice) and exactly one number changed
    changed = (before != after).flatten().nonzero().flatten().tolist()
    assert changed == [0]
    if mask == 0x40:
        assert abs(float(after.flatten()[0])) > 1e30 or abs(float(after.flatten()[0])) < 1e-30
    with pytest.raises(ValueError, match=re.escape(f"{tmp_path / 'checkpoint.pt'}: tensor {NAME!r} does not match the "
                                                   "digest recorded when the checkpoint was saved")):
        _resume(tmp_path / "checkpoint.pt")


def test_a_tensor_or_field_changed_and_saved_back_without_new_digests_is_refused(saved, tmp_path):
    ck = load_checkpoint(saved)
    ck["optimizers"][0]["state"][0]["exp_avg"].view(-1)[1] += 1e-6
    torch.save(ck, tmp_path / "a.pt")
    with pytest.raises(ValueError, match=re.escape("tensor 'optimizers.0.state.0.exp_avg' does not match")):
        _resume(tmp_path / "a.pt")
    ck = load_checkpoint(saved)
    ck["history"][0]["source_val_accuracy"] = 1.0
    torch.save(ck, tmp_path / "b.pt")
    with pytest.raises(ValueError, match=re.escape("field 'history' does not match the digest")):
        _resume(tmp_path / "b.pt")


def _forged(saved, tmp_path, change):
    """The checkpoint with ``change`` applied and its digests recomputed (what a forger who knows the format
    writes): only the plausibility checks stand in the way."""
    ck = load_checkpoint(saved)
    change(ck)
    ck["digests"] = checkpoint_digests(ck)
    torch.save(ck, tmp_path / "forged.pt")
    return tmp_path / "forged.pt"


def _set(*keys, value):
    def change(ck):
        d = ck
        for k in keys[:-1]:
            d = d[k]
        d[keys[-1]] = value(d[keys[-1]]) if callable(value) else value
    return change


@pytest.mark.parametrize("change, message", [
    (_set("step", value=-5), "checkpoint field 'step' is -5; accepted: an integer in [0, 10]"),
    (_set("step", value=10 ** 9), "checkpoint field 'step' is 1000000000; accepted: an integer in [0, 10]"),
    (_set("step", value=7.0), "checkpoint field 'step' is 7.0; accepted: an integer in [0, 10]"),
    (_set("stage_index", value=5), "checkpoint field 'stage_index' is 5; accepted: an integer in [-1, 1]"),
    (_set("stage_index", value=0), "checkpoint field 'stage_index' is 0; accepted: 1 (step 6 lies in stage 'adapt', "
                                   "steps [5, 10))"),
    (_set("batches", "source", "pos", value=10 ** 6), "'source.pos' is 1000000; accepted: an integer in [0, 32]"),
    (_set("batches", "target", "order", value=lambda o: o.clone().fill_(3)), "'target.order' is not a permutation"),
    # evaluations at steps 3, 6 and 7 (the end of the first run)
    (_set("history", value=lambda h: h[:2] + [{**h[-1], "step": 9}]), "checkpoint field 'history[2].step' is 9; "
     "accepted: an integer after the previous record's step (6) and at most the checkpoint's step (7)"),
    (_set("history", value=lambda h: h[::-1]), "checkpoint field 'history[1].step' is 6; accepted: an integer after "
                                               "the previous record's step (7)"),
    (_set("skipped_steps", value=-1), "checkpoint field 'skipped_steps' is -1; accepted: an integer in [0, 7]"),
    (_set("skipped_updates", value=-3), "checkpoint field 'skipped_updates' is -3; accepted: an integer in [0, 0]"),
    (_set("optimizers", 1, "param_groups", 0, "eps", value=1.0),  # adapt stage: Adam for both updates
     "checkpoint field 'optimizers[1].param_groups[0].eps' is 1.0; accepted: 1e-08"),
    (_set("optimizers", 0, "param_groups", 0, "lr", value=0.5),
     "checkpoint field 'optimizers[0].param_groups[0].lr' is 0.5; accepted: 0.0002"),
    (_set("optimizers", 0, "state", 0, "step", value=torch.tensor(1e6)),
     "checkpoint field 'optimizers[0].state[0].step' is tensor(1000000.); accepted: a count of optimiser steps in "
     "[0, 2]"),
    (_set("optimizers", 0, "state", 0, "exp_avg", value=torch.zeros(3)),
     "checkpoint field 'optimizers[0].state[0].exp_avg' is a tensor of shape (3,); accepted: the parameter's "
     "shape ("),
    (_set("rng", "numpy", "pos", value=700), "checkpoint field 'rng.numpy.pos' is 700; accepted: an integer in [0, 624]"),
    (_set("wall", value=float("nan")), "checkpoint field 'wall' is nan; accepted: a finite number of seconds >= 0"),
])
def test_a_value_this_run_could_not_have_written_is_refused_naming_field_value_and_range(saved, tmp_path, change,
                                                                                      message):
    path = _forged(saved, tmp_path, change)
    with pytest.raises(ValueError, match=re.escape(message)) as err:
        _resume(path)
    assert str(err.value).startswith(str(path))


def test_the_forging_helper_alone_changes_nothing_that_is_refused(saved, tmp_path):
    # control for the test above: rewritten unchanged, the checkpoint resumes where the intact one does
    forged, intact = _resume(_forged(saved, tmp_path, lambda ck: None)), _resume(saved)
    assert forged.step == intact.step == 7
    assert all(torch.equal(a, b) for a, b in zip(forged.model.state_dict().values(),
                                                 intact.model.state_dict().values()))


def test_a_checkpoint_with_an_unknown_entry_is_refused(saved, tmp_path):
    with pytest.raises(ValueError, match=re.escape("holds unknown checkpoint entries ['extra']")):
        _resume(_forged(saved, tmp_path, _set("extra", value=np.int64(1).item())))
