"""adaptkit.load_run: a finished run folder, loaded in a fresh process, predicts exactly as the live run did; damaged
or changed folders are refused, naming the folder and what is wrong."""
import json
import os
import random
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
import yaml
from sklearn.metrics import accuracy_score
from torch import nn

import adaptkit

ENV = {**os.environ, "OMP_NUM_THREADS": "1", "PYTHONPATH": str(Path(__file__).resolve().parents[1] / "src")}
MOONS = {"n_source": 120, "n_target": 120}

# what a fresh interpreter does with the folder: nothing of the live run is in its memory
LOAD_AND_PREDICT = """
import sys, numpy as np, adaptkit
folder, inputs, out = sys.argv[1:]
run = adaptkit.load_run(folder)
x = np.load(inputs)
np.savez(out, target=run.predict_proba(x), source=run.predict_proba(x, domain="source"), labels=run.predict(x),
         training=np.array([run.model.training]))
"""


_TRAINED = {}


def _trained(method, tmp_path_factory):
    """A finished tiny run of ``method`` in a folder, trained once per test module."""
    if method not in _TRAINED:
        folder = tmp_path_factory.mktemp(method) / "run"
        run = adaptkit.fit("rotated_moons", method=method, steps=60, eval_every=30, progress=False,
                           run_dir=str(folder), data_options=MOONS, diagnostics=False)
        _TRAINED[method] = run, folder
    return _TRAINED[method]


@pytest.fixture(params=["dann", "adda"])
def trained(request, tmp_path_factory):
    return _trained(request.param, tmp_path_factory)


def _load_in_fresh_process(folder: Path, x: np.ndarray, tmp_path: Path):
    np.save(tmp_path / "x.npy", x)
    done = subprocess.run([sys.executable, "-c", LOAD_AND_PREDICT, str(folder), str(tmp_path / "x.npy"),
                           str(tmp_path / "out.npz")], capture_output=True, text=True, env=ENV, timeout=180)
    assert done.returncode == 0, done.stderr
    return np.load(tmp_path / "out.npz")


def test_a_loaded_run_predicts_exactly_as_the_live_run_in_a_fresh_process(trained, tmp_path):
    run, folder = trained
    pair = run.data
    x = torch.cat([pair.target_test_x, pair.target_train_x[:50], pair.source_val.x]).numpy()
    got = _load_in_fresh_process(folder, x, tmp_path)
    assert not got["training"][0]  # loaded in evaluation mode
    # exact: same weights, same encoder, same arithmetic on the same CPU (np.array_equal: bit-equal floats)
    assert np.array_equal(got["target"], run.predict_proba(x))
    assert np.array_equal(got["source"], run.predict_proba(x, domain="source"))
    assert np.array_equal(got["labels"], run.predict(x))
    # the loaded model scores the held-out target as the run's evaluator did (accuracy by scikit-learn)
    test = pair.scoring_sets()["target_test"]
    n = len(pair.target_test_x)
    assert accuracy_score(test.y.numpy(), got["labels"][:n]) == pytest.approx(run.summary["target_accuracy"], abs=1e-6)


def test_an_adda_run_loads_with_target_inputs_through_its_own_target_encoder(tmp_path_factory):
    run, folder = _trained("adda", tmp_path_factory)  # the bundled method with an unshared target encoder
    loaded = adaptkit.load_run(folder)
    assert not loaded.model.encoders_shared and bool(loaded.model.target_encoder_active)
    x = run.data.target_test_x
    # target inputs go through M_t, not M_s: the two encoders give different features after the adapt stage, and
    # the target predictions are those of head(M_t(x)) computed here with torch directly
    with torch.no_grad():
        by_hand = torch.softmax(loaded.model.head(loaded.model.target_encoder(x)), 1).numpy()
        source_side = torch.softmax(loaded.model.head(loaded.model.source_encoder(x)), 1).numpy()
    assert not np.allclose(by_hand, source_side)
    assert np.array_equal(loaded.predict_proba(x), by_hand)
    assert np.array_equal(loaded.predict_proba(x), run.predict_proba(x))


def test_missing_folder_or_file_is_named(trained, tmp_path):
    _, folder = trained
    with pytest.raises(FileNotFoundError, match=r"run folder .*nowhere.* does not exist"):
        adaptkit.load_run(tmp_path / "nowhere")
    copy = tmp_path / "copy"
    copy.mkdir()
    for name in ("config.yaml", "summary.json"):
        (copy / name).write_bytes((folder / name).read_bytes())
    with pytest.raises(FileNotFoundError, match=rf"run folder '{copy}' lacks checkpoint.pt"):
        adaptkit.load_run(copy)
    (copy / "checkpoint.pt").write_bytes((folder / "checkpoint.pt").read_bytes())
    (copy / "summary.json").unlink()
    with pytest.raises(FileNotFoundError, match="lacks summary.json.*has not finished"):
        adaptkit.load_run(copy)


def _copy(folder: Path, to: Path) -> Path:
    to.mkdir()
    for name in ("config.yaml", "summary.json", "checkpoint.pt"):
        (to / name).write_bytes((folder / name).read_bytes())
    return to


def test_a_damaged_checkpoint_or_changed_config_is_refused(trained, tmp_path):
    _, folder = trained
    damaged = _copy(folder, tmp_path / "damaged")
    state = torch.load(damaged / "checkpoint.pt", weights_only=True)
    w = next(v for v in state["model"].values() if v.is_floating_point())
    w.view(-1)[0] += 1.0  # the digests recorded at saving no longer match
    torch.save(state, damaged / "checkpoint.pt")
    with pytest.raises(ValueError, match="does not match the digest recorded"):
        adaptkit.load_run(damaged)

    changed = _copy(folder, tmp_path / "changed")
    config = yaml.safe_load((changed / "config.yaml").read_text())
    config["steps"] = 61
    (changed / "config.yaml").write_text(yaml.safe_dump(config))
    with pytest.raises(ValueError, match=r"config hash .*steps: 60 -> 61"):
        adaptkit.load_run(changed)

    unfinished = _copy(folder, tmp_path / "unfinished")
    summary = json.loads((unfinished / "summary.json").read_text())
    (unfinished / "summary.json").write_text(json.dumps({**summary, "status": "running"}))
    with pytest.raises(ValueError, match="status is 'running', not 'finished'"):
        adaptkit.load_run(unfinished)


def test_a_run_with_its_own_encoder_needs_that_encoder_and_leaves_the_generators_alone(tmp_path):
    def encoder():
        return nn.Sequential(nn.Linear(2, 16), nn.ReLU(), nn.Linear(16, 8), nn.ReLU())

    run = adaptkit.fit("rotated_moons", method="coral", encoder=encoder(), steps=20, progress=False,
                       run_dir=str(tmp_path / "run"), data_options=MOONS, diagnostics=False)
    with pytest.raises(ValueError, match=r"the encoder was given to the run as an object .*load_run\(path, encoder=\.\.\.\)"):
        adaptkit.load_run(tmp_path / "run")
    fresh = encoder()  # built (and its weights drawn) before the generators are seeded
    random.seed(5), np.random.seed(5), torch.manual_seed(5)
    loaded = adaptkit.load_run(tmp_path / "run", encoder=fresh)
    after = (random.random(), np.random.rand(), torch.rand(1).item())
    random.seed(5), np.random.seed(5), torch.manual_seed(5)
    assert after == (random.random(), np.random.rand(), torch.rand(1).item())  # the caller's draws are unchanged
    x = run.data.target_test_x
    assert np.array_equal(loaded.predict_proba(x), run.predict_proba(x))


@pytest.mark.parametrize("settings", [{"method": "coral", "guard": True}, {"method": "dann", "weight": "auto"},
                                      {"method": "mmd", "scores": ["dev"], "select": "score/dev"}],
                         ids=["guarded", "auto-weight", "selected"])
def test_guarded_and_selected_runs_load_with_the_weights_they_kept(tmp_path, settings):
    # the folder of a guarded run holds the kept candidate (or the source-only fallback); a selected run keeps its
    # best evaluated state: either way the loaded model is the one the live run predicts with
    run = adaptkit.fit("rotated_moons", steps=40, progress=False, run_dir=str(tmp_path / "run"), data_options=MOONS,
                       diagnostics=False, **settings)
    loaded = adaptkit.load_run(tmp_path / "run")
    x = run.data.target_test_x
    assert np.array_equal(loaded.predict_proba(x), run.predict_proba(x))
