"""class_weights=reestimated: the class ratios follow the model's own BBSE estimate during training.

References: BBSE's closed form w = C⁻¹ μ (Lipton, Wang & Smola, ICML 2018, with C[i, j] = P̂(ŷ = i, y = j) on
source validation and μ[i] = P̂(ŷ = i) on the target), computed here with numpy from the run's own predictions;
re-estimation during training as in importance-weighted adversarial networks (Combes et al., NeurIPS 2020).
"""
from __future__ import annotations

import json

import numpy as np
import pytest
import torch

from adaptkit import DomainPair, fit
from adaptkit.data.batches import PairedBatches
from adaptkit.data.pair import TrainingData
from adaptkit.train.loop import Interrupted, load_checkpoint
from adaptkit.trust.reweighting import MOMENTUM, ReweightedBatches


def _label_shifted_moons(seed: int = 0, n: int = 400, share0: float = 0.8, angle: float = 20.0) -> DomainPair:
    """Two moons (sklearn.datasets.make_moons), the target rotated by 20° and resampled to ``share0`` of class 0
    (the source is balanced): a label shift as well as a covariate shift."""
    from sklearn.datasets import make_moons

    xs, ys = make_moons(n, noise=0.1, random_state=seed)
    xt, yt = make_moons(2 * n, noise=0.1, random_state=seed + 1)
    rng = np.random.default_rng(seed)
    keep = np.concatenate([rng.choice(np.flatnonzero(yt == 0), int(share0 * n), replace=False),
                           rng.choice(np.flatnonzero(yt == 1), n - int(share0 * n), replace=False)])
    th = np.radians(angle)
    rot = np.array([[np.cos(th), -np.sin(th)], [np.sin(th), np.cos(th)]])
    return DomainPair(xs, ys, xt[keep] @ rot.T, yt[keep], name="moons_label_shift")


def test_reweighted_batches_multiply_each_source_weight_by_its_class_ratio():
    g = torch.Generator().manual_seed(0)
    data = TrainingData(torch.randn(30, 2, generator=g), torch.arange(30) % 3, torch.randn(20, 2, generator=g),
                        source_w=torch.rand(30, generator=g))
    ratios = np.array([0.5, 2.0, 1.25])
    plain, weighted = PairedBatches(data, 8, seed=1), ReweightedBatches(PairedBatches(data, 8, seed=1), ratios)
    for _ in range(5):  # more than one pass over the 30 rows
        a, b = plain.next(), weighted.next()
        assert torch.equal(a.x_src, b.x_src) and torch.equal(a.x_tgt, b.x_tgt)  # same draws
        # numpy fancy indexing is the reference for w_i = ratio[y_i] · w_i
        np.testing.assert_allclose(b.w_src.numpy(), ratios[a.y_src.numpy()] * a.w_src.numpy(), rtol=1e-6)


def test_a_saved_ratio_state_round_trips_and_a_bad_one_is_refused():
    data = TrainingData(torch.randn(10, 2), torch.arange(10) % 2, torch.randn(10, 2))
    b = ReweightedBatches(PairedBatches(data, 4, seed=0), [1.0, 3.0])
    b.next()
    state = b.state_dict()
    again = ReweightedBatches(PairedBatches(data, 4, seed=0), [1.0, 1.0])
    again.load_state_dict(state)
    assert again.ratios.tolist() == [1.0, 3.0] and torch.equal(again.next().w_src, b.next().w_src)
    with pytest.raises(ValueError, match=r"'ratios' is a tensor of shape \(3,\); accepted: 2 finite non-negative"):
        again.load_state_dict({**state, "ratios": torch.ones(3)})
    with pytest.raises(ValueError, match="'ratios' is .*accepted: 2 finite non-negative"):
        again.load_state_dict({**state, "ratios": torch.tensor([1.0, -1.0])})


def test_the_ratios_move_halfway_to_the_models_bbse_estimate_at_every_evaluation():
    pair = _label_shifted_moons()
    run = fit(pair, method="mmd", class_weights="reestimated", steps=60, eval_every=20, batch_size=64, seed=0,
              progress=False, device="cpu")
    rows = [h for h in run.history if "class_ratio/0" in h]
    assert [h["step"] for h in rows] == [20, 40, 60] and all(h["class_ratio/updated"] == 1.0 for h in rows)
    # the last update, recomputed with numpy from the final model (the last evaluation saw this very model)
    pv = run.predict(pair.source_val.x, domain="source")
    yv = pair.source_val.y.numpy()
    pt = run.predict(pair.target_train_x)
    c = np.zeros((2, 2))
    np.add.at(c, (pv, yv), 1.0 / len(yv))
    mu = np.bincount(pt, minlength=2) / len(pt)
    w = np.linalg.solve(c, mu)  # BBSE, Lipton et al. 2018: w = C⁻¹ μ
    assert (w > 0).all()  # inside the simplex: no projection or cap applies, so the closed form is the estimate
    before = np.array([rows[-2]["class_ratio/0"], rows[-2]["class_ratio/1"]])
    want = (1 - MOMENTUM) * before + MOMENTUM * w
    np.testing.assert_allclose([rows[-1]["class_ratio/0"], rows[-1]["class_ratio/1"]], want, rtol=1e-5)
    assert run.summary["class_weights"]["ratios"] == pytest.approx(want.tolist(), rel=1e-5)
    assert run.summary["class_weights"]["from"] == ("re-estimated from the model at every evaluation, starting "
                                                    "from equal weights")
    # the target holds 80 % class 0: the estimate must weight class 0 up and class 1 down (source is 50/50)
    assert want[0] > 1 > want[1]


def test_a_resumed_reestimating_run_equals_the_uninterrupted_one(tmp_path, monkeypatch):
    from tests.train.test_resume import _sigterm_at, assert_same_run

    pair = _label_shifted_moons(n=160)
    kw = dict(method="coral", class_weights="reestimated", steps=30, batch_size=32, eval_every=7, seed=2,
              progress=False, device="cpu")
    fit(pair, run_dir=tmp_path / "ref", **kw)
    _sigterm_at(monkeypatch, {17})  # after the evaluations at 7 and 14: the ratios have moved twice
    with pytest.raises(Interrupted):
        fit(pair, run_dir=tmp_path / "run", **kw)
    saved = load_checkpoint(tmp_path / "run" / "checkpoint.pt")["batches"]["ratios"]
    assert saved.tolist() != load_checkpoint(tmp_path / "ref" / "checkpoint.pt")["batches"]["ratios"].tolist()
    fit(pair, run_dir=tmp_path / "run", **kw)
    assert_same_run(tmp_path / "run", tmp_path / "ref")
    summary = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert summary["diagnostics"]["label_shift_warning"] is None  # weighted runs are meant to move the proportions


def test_an_unknown_class_weights_choice_names_the_accepted_ones():
    with pytest.raises(ValueError, match=r"must be one of \{'estimated', 'reestimated', 'none'\}. Got 're-estimated' instead"):
        fit("rotated_moons", class_weights="re-estimated", steps=2, progress=False)


def test_a_dataset_pair_reestimates_from_its_in_memory_sample_as_the_arrays_do():
    from tests.data.test_streaming import _as_datasets

    pair = _label_shifted_moons(n=200)
    kw = dict(method="mmd", class_weights="reestimated", steps=40, eval_every=20, batch_size=32, seed=1,
              progress=False, device="cpu", diagnostics=False)
    arrays, streamed = fit(pair, **kw), fit(_as_datasets(pair), **kw)
    ratios = lambda run: [[h[f"class_ratio/{k}"] for k in (0, 1)] for h in run.history]  # noqa: E731
    # both read the same batches; the streamed source carries explicit unit weights, so float sums may differ
    np.testing.assert_allclose(ratios(streamed), ratios(arrays), rtol=1e-4)
    assert ratios(arrays)[0] != [1.0, 1.0]
