"""The streaming path (adaptkit.data.streaming): a DatasetPair read through a DataLoader gives the in-memory path's
batches, trains the in-memory run's weights, resumes bit for bit with workers, and refuses a bad saved position.

References outside the streaming module: the in-memory path (``PairedBatches``, ``fit`` on a ``DomainPair``), whose
index order is checked here against ``torch.randperm`` under the generator seeds it documents (seed·2+1 for the
source, seed·2+2 for the target), and torch's own ``torch.equal``.
"""
from __future__ import annotations

import re

import pytest
import torch
from torch.utils.data import Dataset, TensorDataset

from adaptkit import DatasetPair, fit
from adaptkit.data.batches import PairedBatches
from adaptkit.data.pair import TrainingData
from adaptkit.data.streaming import StreamingBatches
from adaptkit.train.loop import Interrupted, load_checkpoint
from tests.conftest import moons_pair
from tests.train.test_resume import _sigterm_at, assert_same_run


def _tables(seed=0, n_src=37, n_tgt=23, d=3):
    g = torch.Generator().manual_seed(seed)
    xs, xt = torch.randn(n_src, d, generator=g), torch.randn(n_tgt, d, generator=g) + 1
    ys = torch.arange(n_src) % 3
    ws = torch.rand(n_src, generator=g)
    return xs, ys, ws, xt


class _Noisy(Dataset):
    """A dataset whose transform draws random numbers (an augmentation): x + 0.1·N(0, 1) from torch's generator."""

    def __init__(self, x, y=None):
        self.x, self.y = x, y

    def __len__(self):
        return len(self.x)

    def __getitem__(self, i):
        x = self.x[i] + 0.1 * torch.randn(self.x.shape[1:])
        return x if self.y is None else (x, self.y[i])


class _Items(Dataset):
    """The rows of some tensors, item by item (the general path; a TensorDataset is indexed in one go)."""

    def __init__(self, *tensors):
        self.tensors = tensors

    def __len__(self):
        return len(self.tensors[0])

    def __getitem__(self, i):
        return tuple(t[i] for t in self.tensors)


@pytest.mark.parametrize("kind", [TensorDataset, _Items])
@pytest.mark.parametrize("workers", [0, 2])
def test_streaming_batches_equal_the_in_memory_batches_over_several_passes(workers, kind):
    xs, ys, ws, xt = _tables()
    bs, seed, steps = 16, 4, 12  # 12 × 16 = 192 draws: 5 passes over the 37 source and 8 over the 23 target samples
    ratios = [0.5, 2.0, 1.5]
    memory = PairedBatches(TrainingData(xs, ys, xt, ws * torch.tensor(ratios)[ys]), bs, seed)
    stream = StreamingBatches(kind(xs, ys, ws), kind(xt, -torch.ones(len(xt))), bs, seed,
                              workers=workers, class_ratios=ratios, n_classes=3)
    got = [stream.next() for _ in range(steps)]
    for a, b in zip((memory.next() for _ in range(steps)), got):
        for name in ("x_src", "y_src", "x_tgt", "w_src"):
            assert torch.equal(getattr(a, name), getattr(b, name)), name
    # the order itself, from torch.randperm under the documented seed: pass 1 of the source is randperm(37)
    first = torch.randperm(37, generator=torch.Generator().manual_seed(seed * 2 + 1))
    assert torch.equal(torch.cat([b.x_src for b in got])[:37], xs[first])
    tgt = torch.Generator().manual_seed(seed * 2 + 2)
    passes = torch.cat([torch.randperm(23, generator=tgt) for _ in range(9)])[:steps * bs]
    assert torch.equal(torch.cat([b.x_tgt for b in got]), xt[passes])  # wrap-around mid-batch included
    assert stream.state_dict()["drawn"] == steps
    stream.close()


def test_a_random_transform_draws_the_same_numbers_with_any_workers_and_after_a_resume():
    xs, ys, _, xt = _tables(1)
    make = lambda w: StreamingBatches(_Noisy(xs, ys), _Noisy(xt), 8, 2, workers=w)  # noqa: E731
    a, b = make(0), make(2)
    first = [a.next() for _ in range(6)]
    assert all(torch.equal(p.x_src, b.next().x_src) for p in first)  # 2 workers: the same noise as 0
    saved = a.state_dict()
    rest = [a.next().x_tgt for _ in range(5)]
    resumed = make(2)
    resumed.load_state_dict(saved)
    assert all(torch.equal(r, resumed.next().x_tgt) for r in rest)
    assert not torch.equal(first[0].x_src, xs[:8])  # the noise is really there
    b.close(), resumed.close()


def _as_datasets(pair):
    """The DomainPair's own splits as map-style datasets (the target's labels only in its scoring set)."""
    test = pair.scoring_sets()["target_test"]
    return DatasetPair(TensorDataset(pair.source_train.x, pair.source_train.y), TensorDataset(pair.target_train_x),
                       source_val=TensorDataset(pair.source_val.x, pair.source_val.y),
                       target_test=TensorDataset(test.x, test.y), n_classes=pair.n_classes, name=pair.name)


def test_a_run_through_the_streaming_path_equals_the_in_memory_run():
    pair = moons_pair(n=80)
    kw = dict(method="dann", steps=30, batch_size=16, eval_every=10, seed=3, progress=False, device="cpu",
              scores=["target_entropy"], class_weights=[1.0, 0.8])
    memory = fit(pair, **kw)
    stream = fit(_as_datasets(pair), loader_workers=2, **kw)
    want, got = memory.model.state_dict(), stream.model.state_dict()
    assert set(want) == set(got) and all(torch.equal(want[k], got[k]) for k in want)  # tolerance: none, bit-equal
    wall = lambda h: [{k: v for k, v in r.items() if k != "wall_seconds"} for r in h]  # noqa: E731
    assert wall(stream.history) == wall(memory.history)  # accuracies on the streamed scoring sets and the score included
    x = pair.scoring_sets()["target_test"].x
    assert (stream.predict_proba(x) == memory.predict_proba(x)).all()
    assert stream.summary["label_shift"] == memory.summary["label_shift"]  # < sample_rows: the same samples


def test_interrupted_and_resumed_with_workers_equals_the_uninterrupted_run(tmp_path, monkeypatch):
    pair = moons_pair(n=80)
    test = pair.scoring_sets()["target_test"]
    data = DatasetPair(_Noisy(pair.source_train.x, pair.source_train.y), _Noisy(pair.target_train_x),
                       source_val=TensorDataset(pair.source_val.x, pair.source_val.y),
                       target_test=TensorDataset(test.x, test.y), n_classes=2, name="noisy-moons")
    kw = dict(method="dann", steps=24, batch_size=16, eval_every=7, seed=5, progress=False, device="cpu",
              diagnostics=False)
    fit(data, run_dir=tmp_path / "ref", loader_workers=0, **kw)
    _sigterm_at(monkeypatch, {10})
    rd = tmp_path / "run"
    with pytest.raises(Interrupted, match="interrupted, resumable: stopped after 11 of 24 steps"):
        fit(data, run_dir=rd, loader_workers=2, **kw)
    assert load_checkpoint(rd / "checkpoint.pt")["batches"]["drawn"] == 11  # consumed, not prefetched
    fit(data, run_dir=rd, loader_workers=2, **kw)
    assert_same_run(rd, tmp_path / "ref")  # weights, optimisers, batch positions, RNG, history, summary


def test_a_bad_saved_position_is_refused_naming_the_field():
    xs, ys, _, xt = _tables()
    stream = StreamingBatches(TensorDataset(xs, ys), TensorDataset(xt), 16, 0)
    stream.next()
    good = stream.state_dict()
    bad = {**good, "source": {**good["source"], "pos": 10**6}}
    with pytest.raises(ValueError, match=re.escape("'source.pos' is 1000000; accepted: an integer in [0, 37]")):
        stream.load_state_dict(bad)
    order = good["target"]["order"].clone()
    order[0] = order[1]
    with pytest.raises(ValueError, match=re.escape("'target.order' is not a permutation of the indices [0, 22]")):
        stream.load_state_dict({**good, "target": {**good["target"], "order": order}})
    with pytest.raises(ValueError, match=re.escape("'drawn' is -1; accepted: an integer >= 0")):
        stream.load_state_dict({**good, "drawn": -1})
    memory_state = PairedBatches(TrainingData(xs, ys, xt), 16, 0).state_dict()  # the in-memory path's: no 'drawn'
    with pytest.raises(ValueError, match=re.escape("must be a dict with 'source', 'target' and 'drawn'; got "
                                                   "['source', 'target']")):
        stream.load_state_dict(memory_state)
    after = stream.next()  # nothing was changed by the refusals
    again = StreamingBatches(TensorDataset(xs, ys), TensorDataset(xt), 16, 0)
    again.load_state_dict(good)
    assert torch.equal(after.x_src, again.next().x_src)


def test_bad_datasets_are_refused_naming_what_was_found():
    xs, ys, _, xt = _tables()
    with pytest.raises(ValueError, match=re.escape("the source's shape (3,); got target (4,)")):
        DatasetPair(TensorDataset(xs, ys), TensorDataset(torch.randn(5, 4)), n_classes=3)
    with pytest.raises(ValueError, match="needs n_classes="):
        DatasetPair(TensorDataset(xs, ys), TensorDataset(xt))
    stream = StreamingBatches(TensorDataset(xs, ys + 1), TensorDataset(xt), 37, 0, n_classes=3)
    with pytest.raises(ValueError, match=re.escape("have labels outside 0..2 (got [3])")):
        stream.next()


def test_post_training_steps_and_estimated_class_weights_on_a_dataset_pair_equal_the_in_memory_ones():
    pair = moons_pair(n=80)  # fewer samples than sample_rows: the in-memory sample is the whole of each split
    kw = dict(method="coral", steps=10, batch_size=16, progress=False, device="cpu", diagnostics=True,
              class_weights="estimated")
    memory, stream = fit(pair, **kw), fit(_as_datasets(pair), **kw)
    assert stream.summary["class_weights"] == memory.summary["class_weights"]
    assert stream.summary["label_shift"] == memory.summary["label_shift"]
    assert stream.summary["diagnostics"] == memory.summary["diagnostics"]
