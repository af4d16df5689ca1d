"""Self-training's momentum-averaged teacher (``teacher="ema"``): its weights follow the mean-teacher rule of
Tarvainen & Valpola, NeurIPS 2017, §2 (θ'_t = α·θ'_{t−1} + (1 − α)·θ_t), recomputed here by hand; it receives no
gradient; the pseudo-labels are its own; and a resumed run takes it from the checkpoint."""
import numpy as np
import pytest
import torch
from scipy.special import log_softmax

from adaptkit.data.batches import Batch
from adaptkit.methods import METHODS, Progress, SetupInfo
from adaptkit.nets import AdaptedModel, MLPEncoder, MLPHead
from tests.methods.test_contract import _full_and_resumed, _params

torch.set_num_threads(1)


def _attached(**options):
    torch.manual_seed(0)
    # the by-hand checks below select rows by threshold alone: class balance (the default since 2026-12-03) off
    method = METHODS.get("self_training")(teacher="ema", **{"class_balanced": False, **options})
    model = AdaptedModel(MLPEncoder((2,), hidden=[8], features=4), MLPHead(4, 3, hidden=[8], dropout=0.0),
                         feature_dim=4, n_classes=3)
    method.attach(model, SetupInfo(feature_dim=4, n_classes=3, input_shape=(2,), batch_size=8, steps=10))
    pretrain, self_train = method.stages()
    method.on_stage_start(self_train)  # the teacher starts as a copy of the model
    return method, model, self_train.updates[0]


def _batch(seed, n=16):
    g = torch.Generator().manual_seed(seed)
    return Batch(torch.randn(n, 2, generator=g), torch.randint(0, 3, (n,), generator=g),
                 torch.randn(n, 2, generator=g) + 1.0, None)


def _student_weights(model):
    return {f"{i}.{n}": p.detach().clone() for i, m in enumerate((model.target_encoder, model.head))
            for n, p in m.named_parameters()}


def test_ema_teacher_weights_are_the_mean_teacher_average_after_k_steps():
    alpha, k = 0.8, 5
    method, model, update = _attached(teacher_decay=alpha, threshold=0.0, weight=1.0)
    opt = torch.optim.SGD([p for m in update.modules for p in m.parameters()], lr=0.5)
    seen = []  # θ_0 … θ_{k−1}: the model's weights before each self-training step
    for j in range(k):
        seen.append(_student_weights(model))
        opt.zero_grad()
        loss, _ = update.loss(_batch(j), Progress(j, "self_train", j, j / k))
        loss.backward()
        opt.step()
    assert not all(torch.equal(seen[0][n], seen[-1][n]) for n in seen[0])  # the model did move
    # By hand (Tarvainen & Valpola 2017, §2): θ'_0 = θ_0, then θ'_t = α θ'_{t−1} + (1 − α) θ_t after each step t;
    # the teacher used at step t + 1 is θ'_t, so after the k-th step's loss the teacher is θ'_{k−1}.
    expected = {n: t.double() for n, t in seen[0].items()}
    for theta in seen[1:]:
        expected = {n: alpha * expected[n] + (1 - alpha) * theta[n].double() for n in expected}
    teacher = dict(method.teacher.state_dict())
    assert set(teacher) == set(expected)  # this small net has no buffers of its own: the weights are all of it
    for n, want in expected.items():
        torch.testing.assert_close(teacher[n].double(), want, rtol=1e-6, atol=1e-7)
        assert not torch.allclose(teacher[n], seen[-1][n])  # an average, not the latest model


def test_ema_teacher_gets_no_gradient_and_gives_the_pseudo_labels():
    method, model, update = _attached(teacher_decay=0.5, threshold=0.6, weight=1.0)
    assert list(method.teacher.parameters()) == []  # weights are buffers: no optimiser can hold them
    with torch.no_grad():  # make the teacher disagree with the model, so the labels' source is visible
        for t in method.teacher.state_dict().values():
            t.add_(torch.randn_like(t) * 2.0)
    b = _batch(7, n=64)
    loss, logs = update.loss(b, Progress(0, "self_train", 0, 0.5))
    loss.backward()
    assert all(not t.requires_grad and t.grad is None for t in method.teacher.state_dict().values())
    assert all(p.grad is not None for p in model.encoder.parameters())  # the model did get its gradient
    # By hand: the teacher after its one EMA step predicts the labels; the model's logits are scored against them.
    with torch.no_grad():
        z_teacher = method.teacher(b.x_tgt).numpy().astype(np.float64)
        z_model = model(b.x_tgt).numpy().astype(np.float64)
    p_teacher = np.exp(log_softmax(z_teacher, axis=1))
    rows = p_teacher.max(1) > 0.6
    labels = p_teacher.argmax(1)
    assert 0 < rows.sum() < 64 and (labels[rows] != z_model.argmax(1)[rows]).any()
    by_hand = -log_softmax(z_model, axis=1)[rows, labels[rows]].mean()
    assert logs["pseudo"].item() == pytest.approx(by_hand, rel=1e-5)
    assert logs["kept"].item() == pytest.approx(rows.mean())


def test_the_current_model_teacher_has_no_copy():
    method = METHODS.get("self_training")()
    assert method.options.teacher == "current" and not hasattr(method, "teacher")


def test_ema_teacher_resumes_from_the_checkpoint(tmp_path):
    # Checkpoint inside the self-training stage (steps 4–7 of 8): a resumed run, built with another seed, must take
    # the teacher from the checkpoint (on_stage_start does not run again) to continue bit for bit.
    options = {"teacher": "ema", "teacher_decay": 0.7, "threshold": 0.5}
    full, resumed = _full_and_resumed("self_training", options, 6, tmp_path)
    for (k, a), (_, b) in zip(_params(full).items(), _params(resumed).items()):
        assert torch.equal(a, b), f"self_training (ema teacher): {k} differs after resume"
    for (k, a), (_, b) in zip(full.method.teacher.state_dict().items(), resumed.method.teacher.state_dict().items()):
        assert torch.equal(a, b), f"teacher {k} differs after resume"
