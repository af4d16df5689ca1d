import json
import math
import re
import sys
from typing import List

import pytest
import torch
from torch import nn

from adaptkit import fit
from adaptkit.methods.base import Alignment, Stage, Update
from adaptkit.train.loop import DivergenceError, stage_bounds
from tests.conftest import moons_pair


class TwoStageProbe(Alignment):
    """A test method: stage 'a' trains only the head, stage 'b' only the encoder, the latter's update twice per
    step. Records what the loop hands it."""

    name = "probe"

    def setup(self, model, info):
        self.calls: List[tuple] = []
        self.started: List[str] = []

    def stages(self):
        m = self.model

        def loss_a(batch, t):
            self.calls.append(("a", t.step, t.stage_step, t.p))
            return self.source_loss(batch)

        def loss_b(batch, t):
            self.calls.append(("b", t.step, t.stage_step, t.p))
            return self.source_loss(batch)

        return [Stage("a", [Update("head_only", [m.head], loss_a)], share=1),
                Stage("b", [Update("encoder_only", [m.encoder], loss_b, repeat=2)], share=3)]

    def on_stage_start(self, stage):
        self.started.append(stage.name)


def test_stage_bounds_split_by_share():
    s = [Stage("x", [], share=1), Stage("y", [], share=3)]
    assert stage_bounds(s, 10) == [(0, 2), (2, 10)]  # round(2.5) = 2 (banker's rounding), rest to the last
    assert stage_bounds(s, 8) == [(0, 2), (2, 8)]


def test_updates_change_only_declared_parameters_and_stages_run_in_order():
    pair = moons_pair(n=60)
    probe = TwoStageProbe()
    run = fit(pair, method=probe, steps=8, batch_size=8, progress=False, device="cpu", eval_every=2)
    assert probe.started == ["a", "b"]
    kinds = [c[0] for c in probe.calls]
    assert kinds == ["a"] * 2 + ["b"] * 12  # 2 steps of a; 6 steps of b, each repeated twice
    assert probe.calls[0][3] == 0.0 and probe.calls[1][3] == 0.5  # progress p within stage a
    assert [c[2] for c in probe.calls[2:]] == [k for k in range(6) for _ in range(2)]
    assert len(run.history) == 4 and run.history[0]["stage"] == "a" and run.history[-1]["stage"] == "b"


def test_a_head_only_update_leaves_the_encoder_bit_identical():
    pair = moons_pair(n=60)

    class HeadOnly(Alignment):
        name = "head_only"

        def stages(self):
            return [Stage("s", [Update("h", [self.model.head], self.source_loss)])]

    torch.manual_seed(0)
    enc = nn.Sequential(nn.Linear(2, 8), nn.ReLU())
    before = [p.detach().clone() for p in enc.parameters()]
    run = fit(pair, method=HeadOnly(), encoder=enc, steps=5, batch_size=8, progress=False, device="cpu")
    assert all(torch.equal(a, b) for a, b in zip(before, run.model.encoder.parameters()))
    assert run.summary["steps"] == 5


def test_one_step_matches_a_hand_written_sgd_step():
    # Reference: the same computation written directly with torch.optim.SGD (PyTorch semantics).
    pair = moons_pair(n=40)
    torch.manual_seed(3)
    enc, head = nn.Sequential(nn.Linear(2, 6), nn.ReLU()), nn.Linear(6, 2)
    import copy

    enc_ref, head_ref = copy.deepcopy(enc), copy.deepcopy(head)
    run = fit(pair, method="source_only", encoder=enc, head=head, steps=1, batch_size=len(pair.source_train),
              optim={"lr": 0.1, "momentum": 0.0}, progress=False, device="cpu")
    params = list(enc_ref.parameters()) + list(head_ref.parameters())
    opt = torch.optim.SGD(params, lr=0.1)
    from adaptkit.data.batches import PairedBatches

    batch = PairedBatches(pair.training_data(), len(pair.source_train), seed=0).next()
    loss = nn.functional.cross_entropy(head_ref(enc_ref(batch.x_src)), batch.y_src)
    loss.backward()
    opt.step()
    for a, b in zip(params, list(run.model.encoder.parameters()) + list(run.model.head.parameters())):
        torch.testing.assert_close(a, b)


def test_learning_rate_schedule_is_applied_per_stage_progress():
    pair = moons_pair(n=40)
    seen = []

    class LrProbe(Alignment):
        name = "lr_probe"

        def stages(self):
            def loss(batch, t):
                seen.append(t.p)
                return self.source_loss(batch)
            return [Stage("s", [Update("u", [self.model.encoder, self.model.head], loss)])]

    from adaptkit.train import loop

    lrs = []
    orig = loop.Trainer._run_update

    def spy(self, u, opt, batch, t):
        lrs.append(opt.param_groups[0]["lr"])
        return orig(self, u, opt, batch, t)

    loop.Trainer._run_update = spy
    try:
        fit(pair, method=LrProbe(), steps=4, batch_size=8, optim={"lr": 0.01, "schedule": "dann_anneal"},
            progress=False, device="cpu")
    finally:
        loop.Trainer._run_update = orig
    # μ_p = μ0 / (1 + 10p)^0.75 (Ganin et al., JMLR 2016, §5.2.2)
    assert lrs == pytest.approx([0.01 / (1 + 10 * p) ** 0.75 for p in (0, 0.25, 0.5, 0.75)])


def test_same_seed_gives_identical_numbers_and_other_seed_differs():
    pair = moons_pair(n=80)
    a = fit(pair, method="source_only", steps=40, batch_size=16, seed=1, progress=False, device="cpu")
    b = fit(pair, method="source_only", steps=40, batch_size=16, seed=1, progress=False, device="cpu")
    c = fit(pair, method="source_only", steps=40, batch_size=16, seed=2, progress=False, device="cpu")
    strip = lambda h: [{k: v for k, v in r.items() if k != "wall_seconds"} for r in h]
    assert strip(a.history) == strip(b.history)
    assert strip(a.history) != strip(c.history)


def test_run_folder_contents_and_finished_run_refused(tmp_path):
    pair = moons_pair(n=60)
    rd = tmp_path / "run"
    run = fit(pair, steps=20, batch_size=8, eval_every=5, run_dir=rd, progress=False, device="cpu")
    # one default for every face: a run with a folder measures its diagnostics and draws its plots there
    assert sorted(p.name for p in rd.iterdir()) == [".lock", "checkpoint.pt", "config.yaml", "diagnostics.json",
                                                    "metrics.jsonl", "plots", "summary.json"]
    summary = json.loads((rd / "summary.json").read_text())
    for key in ("method", "data", "seed", "steps", "wall_seconds", "source_val_accuracy", "target_accuracy"):
        assert key in summary
    assert summary["steps"] == 20 and summary["target_accuracy"] == run.summary["target_accuracy"]
    lines = [json.loads(l) for l in (rd / "metrics.jsonl").read_text().splitlines()]
    assert [l["step"] for l in lines] == [5, 10, 15, 20]
    with pytest.raises(ValueError, match=re.escape(f"run folder {str(rd)!r} already holds a finished run")):
        fit(pair, steps=20, batch_size=8, run_dir=rd, progress=False, device="cpu")
    again = fit(pair, steps=20, batch_size=8, eval_every=5, run_dir=rd, overwrite=True, progress=False, device="cpu")
    assert again.summary["target_accuracy"] == run.summary["target_accuracy"]


def test_target_accuracy_is_null_without_target_labels(tmp_path):
    from adaptkit import DomainPair

    p = moons_pair(n=60)
    pair = DomainPair(p.source_train.x, p.source_train.y, p.target_train_x)
    run = fit(pair, steps=5, batch_size=8, run_dir=tmp_path, progress=False, device="cpu")
    assert json.loads((tmp_path / "summary.json").read_text())["target_accuracy"] is None
    assert run.summary["source_val_accuracy"] is not None


def test_a_nan_loss_stops_with_the_update_and_step_named(tmp_path):
    pair = moons_pair(n=60)

    class Breaks(Alignment):
        name = "breaks"

        def stages(self):
            def loss(batch, t):
                l, _ = self.source_loss(batch)  # (loss, logs)
                return (l * float("nan") if t.step == 7 else l), {}
            return [Stage("s", [Update("fragile", [self.model.encoder, self.model.head], loss)])]

    with pytest.raises(DivergenceError, match=r"update 'fragile' in stage 's' produced a non-finite loss \(nan\) "
                                              r"at step 7"):
        fit(pair, method=Breaks(), steps=20, batch_size=8, eval_every=2, checkpoint_every=5, run_dir=tmp_path,
            progress=False, device="cpu")
    from adaptkit.train.loop import load_checkpoint

    assert load_checkpoint(tmp_path / "checkpoint.pt")["step"] == 5  # the last finite checkpoint is kept
    run = fit(pair, method=Breaks(), steps=20, batch_size=8, on_nonfinite="skip", progress=False, device="cpu")
    assert run.summary["skipped_steps"] == 1 and math.isfinite(run.history[-1]["loss/fragile"])


def test_unknown_names_list_the_accepted_ones():
    pair = moons_pair(n=40)
    with pytest.raises(ValueError, match=re.escape("Unknown method 'danm'. Available methods: ")):
        fit(pair, method="danm", steps=1)
    with pytest.raises(ValueError, match=re.escape("Unknown encoder 'resnet9'. Available encoders: lenet, mlp, resnet18, resnet50, small_cnn.")):
        fit(pair, encoder="resnet9", steps=1)
    with pytest.raises(ValueError, match=re.escape("Unknown option 'widht' for encoder 'mlp'. Accepted options: "
                                                   "hidden, features, dropout.")):
        fit(pair, encoder_options={"widht": 3}, steps=1)
    with pytest.raises(ValueError, match=re.escape("The 'schedule' parameter of optim must be one of {'constant', "
                                                   "'cosine', 'dann_anneal'}. Got 'linear' instead.")):
        fit(pair, optim={"schedule": "linear"}, steps=1)
    with pytest.raises(ValueError, match=re.escape("The 'schedule' parameter of optim must be one of {'constant', "
                                                   "'cosine', 'dann_anneal'}. Got 'dann_ramp' instead.")):
        fit(pair, optim={"schedule": "dann_ramp"}, steps=1)  # a weight schedule, not a learning-rate one


def test_batch_size_larger_than_a_domain_cycles():
    pair = moons_pair(n=20)
    run = fit(pair, steps=3, batch_size=500, progress=False, device="cpu")
    assert run.summary["steps"] == 3


def test_a_loss_that_returns_a_bare_tensor_is_refused_naming_the_update():
    from adaptkit import Alignment, Stage, Update

    class Bare(Alignment):
        name = "bare"

        def stages(self):
            return [Stage("s", [Update("plain", [self.model.head], lambda b, t: self.source_loss(b)[0])])]

    with pytest.raises(TypeError, match=re.escape("the loss of update 'plain' of method 'bare' must return (loss, "
                                                  "logs)")):
        fit(moons_pair(n=40), method=Bare(), steps=2, batch_size=8, progress=False, device="cpu")


def test_a_paused_run_continues_exactly_as_one_that_never_paused():
    # run(until=k) trains to step k, evaluates there and pauses; a later run() ends where an unpaused run ends
    from adaptkit.config import RunConfig, resolve
    from adaptkit.run import complete, prepare

    c = resolve(RunConfig(method="dann", steps=30, eval_every=10, batch_size=16, device="cpu", progress=False,
                          data={"name": "rotated_moons", "n_source": 60, "n_target": 60}))
    whole = complete(prepare(c))
    p = prepare(c)
    assert p.trainer.run(until=7) is None and p.trainer.step == 7 and p.trainer.history[-1]["step"] == 7
    paused = complete(p)
    for (name, a), b in zip(whole.model.state_dict().items(), paused.model.state_dict().values()):
        assert torch.equal(a, b), name
    assert [h["step"] for h in paused.history] == [7, 10, 20, 30]


def test_the_progress_bar_is_on_by_default_in_a_jupyter_kernel(monkeypatch):
    import types

    from adaptkit.train.loop import in_notebook

    class ZMQInteractiveShell:  # the class name IPython gives a Jupyter kernel's shell
        pass

    class TerminalInteractiveShell:
        pass

    monkeypatch.delitem(sys.modules, "IPython", raising=False)
    assert not in_notebook()  # plain Python
    for shell, expected in ((ZMQInteractiveShell(), True), (TerminalInteractiveShell(), False), (None, False)):
        monkeypatch.setitem(sys.modules, "IPython", types.SimpleNamespace(get_ipython=lambda s=shell: s))
        assert in_notebook() is expected
