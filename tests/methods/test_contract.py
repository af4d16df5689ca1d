"""Contract tests parametrised over every registered method (ids = registry names, so `pytest -k dann` works).

For each method: a short run completes through the real loop; each update changes exactly the parameters it
declares (checked bit for bit with torch.equal); state saves and restores so a resumed run equals an
uninterrupted one.
"""
import copy

import pytest
import torch

from adaptkit import METHODS, fit
from adaptkit.data.batches import PairedBatches
from adaptkit.methods import SetupInfo, build_method
from adaptkit.nets import AdaptedModel, MLPEncoder, MLPHead
from adaptkit.train.evaluate import Evaluator
from adaptkit.train.loop import Trainer
from adaptkit.train.optim import OptimSettings
from tests.conftest import moons_pair

ALL = METHODS.names()


def mean_gap(fs, ft):
    """A user's plain feature loss, for the feature_loss method."""
    return (fs.mean(0) - ft.mean(0)).pow(2).sum()


def options_for(name):
    return {"loss_fn": mean_gap} if name == "feature_loss" else {}


def _trainer(name, pair, steps=8, run_dir=None, checkpoint_every=0, seed=0, options=None):
    torch.manual_seed(seed)
    method = build_method(name, **(options_for(name) if options is None else options))
    enc = MLPEncoder(pair.input_shape, hidden=[16], features=8)
    model = AdaptedModel(enc, MLPHead(8, pair.n_classes, hidden=[16], dropout=0.5), 8, pair.n_classes)
    method.attach(model, SetupInfo(8, pair.n_classes, pair.input_shape, batch_size=16, steps=steps))
    data = pair.oracle_training_data() if method.uses_target_labels else pair.training_data()
    return Trainer(model, method, PairedBatches(data, 16, seed), steps=steps, optim=OptimSettings(lr=0.05),
                   evaluate=Evaluator(pair.scoring_sets(), pair.target_train_x), eval_every=4, run_dir=run_dir,
                   checkpoint_every=checkpoint_every, meta={"config_hash": "x"}, handle_signals=False)


def _params(trainer):
    named = dict(trainer.model.named_parameters(prefix="model"))
    named.update(trainer.method.named_parameters(prefix="method"))
    return named


@pytest.mark.parametrize("name", ALL)
def test_short_run_completes_through_fit(name):
    pair = moons_pair(n=60)
    run = fit(pair, method=name, head="mlp", steps=6, batch_size=8, eval_every=3, progress=False, device="cpu",
              **options_for(name))
    # a user's loss is shown by its function's name
    shown = "mean_gap" if name == "feature_loss" else name
    assert run.summary["steps"] == 6 and run.summary["method"] == shown
    assert 0.0 <= run.summary["target_accuracy"] <= 1.0


@pytest.mark.parametrize("name", ALL)
def test_each_update_changes_exactly_the_parameters_it_declares(name):
    pair = moons_pair(n=60)
    tr = _trainer(name, pair, steps=8)
    for s, (start, _) in enumerate(tr.bounds):
        tr._enter_stage_for(start)
        stage = tr.stages[s]
        batch = tr.batches.next()
        from adaptkit.methods import Progress

        t = Progress(step=start, stage=stage.name, stage_step=0, p=0.3)
        for u, opt in zip(stage.updates, tr.optimizers):
            declared = {id(p) for p in u.parameters()}
            before = {k: v.detach().clone() for k, v in _params(tr).items()}
            tr._run_update(u, opt, batch, t)
            after = _params(tr)
            changed = {k for k in before if not torch.equal(before[k], after[k])}
            undeclared = {k for k in changed if id(after[k]) not in declared}
            assert not undeclared, f"update {u.name!r} of {name} changed undeclared parameters {sorted(undeclared)}"
            assert changed, f"update {u.name!r} of {name} changed nothing"


@pytest.mark.parametrize("name", ALL)
def test_state_saves_and_restores_to_an_identical_continuation(name, tmp_path):
    pair = moons_pair(n=60)
    full = _trainer(name, pair, steps=8)
    full.run()
    part = _trainer(name, pair, steps=8, run_dir=tmp_path)
    step = part._step

    def step_then_stop():  # a pre-emption request arriving during step 3 (what SIGTERM sets)
        step()
        if part.step == 2:
            part._stop_requested = 1

    part._step = step_then_stop
    from adaptkit.train.loop import Interrupted, load_checkpoint

    with pytest.raises(Interrupted, match="resumable: stopped after 3 of 8 steps"):
        part.run()

    state = load_checkpoint(tmp_path / "checkpoint.pt")
    resumed = _trainer(name, pair, steps=8, seed=123)  # other init: everything must come from the checkpoint
    resumed.load_state_dict(state)
    resumed.run()
    for (k, a), (_, b) in zip(_params(full).items(), _params(resumed).items()):
        assert torch.equal(a, b), f"{name}: {k} differs after resume"
    strip = lambda h: [{k: v for k, v in r.items() if k != "wall_seconds"} for r in h]
    assert strip(full.history) == strip(resumed.history)


def test_adda_keeps_the_source_encoder_and_head_bit_identical_in_the_adapt_stage():
    pair = moons_pair(n=60)
    tr = _trainer("adda", pair, steps=10)
    tr.steps = tr.bounds[0][1]  # run the pretrain stage only
    tr.run()
    enc, head = copy.deepcopy(tr.model.encoder), copy.deepcopy(tr.model.head)
    tr.steps = 10
    tr.run()
    assert all(torch.equal(a, b) for a, b in zip(enc.state_dict().values(), tr.model.encoder.state_dict().values()))
    assert all(torch.equal(a, b) for a, b in zip(head.state_dict().values(), tr.model.head.state_dict().values()))
    assert any(not torch.equal(a, b) for a, b in zip(enc.parameters(), tr.model.target_encoder.parameters()))


def _full_and_resumed(method: str, options: dict, stop: int, tmp_path, steps: int = 8, before_loading=None):
    """Two runs of ``method`` on 60-point moons: one uninterrupted, and one rebuilt with another seed (so
    anything drawn at setup differs) and resumed from the checkpoint an identical run wrote after ``stop`` steps.
    ``before_loading(resumed, full)`` must hold before the checkpoint is loaded (e.g. "the draws differ")."""
    from adaptkit.train.loop import load_checkpoint

    pair = moons_pair(n=60)
    full = _trainer(method, pair, steps=steps, options=options)
    full.run()
    part = _trainer(method, pair, steps=steps, run_dir=tmp_path, checkpoint_every=stop, options=options)
    part.steps = stop
    part.run()
    resumed = _trainer(method, pair, steps=steps, seed=123, options=options)
    if before_loading is not None:
        assert before_loading(resumed, full)
    resumed.load_state_dict(load_checkpoint(tmp_path / "checkpoint.pt"))
    resumed.run()
    return full, resumed


def test_cdan_randomized_map_resumes_with_its_random_matrices(tmp_path):
    # The randomised map's R_f, R_g are drawn once at setup: a resumed run (built with another seed, so other
    # matrices) must take them from the checkpoint, or its discriminator would see another map.
    full, resumed = _full_and_resumed("cdan", {"max_map_size": 0, "random_dim": 16}, 4, tmp_path,
                                      before_loading=lambda r, f: not torch.equal(r.method.r_f, f.method.r_f))
    assert torch.equal(resumed.method.r_f, full.method.r_f) and torch.equal(resumed.method.r_g, full.method.r_g)
    for (k, a), (_, b) in zip(_params(full).items(), _params(resumed).items()):
        assert torch.equal(a, b), f"cdan (randomised): {k} differs after resume"
