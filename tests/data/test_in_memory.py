"""A torch Dataset accepted wherever arrays are: DomainPair reads a map-style Dataset into memory
(adaptkit.data.in_memory) and builds exactly the pair the same arrays build."""
from __future__ import annotations

import re

import numpy as np
import pytest
import torch
from torch.utils.data import IterableDataset, TensorDataset

from adaptkit import DomainPair
from adaptkit.data.in_memory import read_dataset


def _arrays(seed=0):
    g = torch.Generator().manual_seed(seed)
    xs, ys = torch.randn(50, 2, 3, generator=g), torch.arange(50) % 3
    xt, yt = torch.randn(40, 2, 3, generator=g) + 1, torch.arange(40) % 3
    return xs, ys, xt, yt


def _same(a: DomainPair, b: DomainPair):
    for get in (lambda p: p.source_train.x, lambda p: p.source_train.y, lambda p: p.source_val.x,
                lambda p: p.target_train_x, lambda p: p.target_test_x):
        assert torch.equal(get(a), get(b))
    sa, sb = a.scoring_sets(), b.scoring_sets()
    assert sa.keys() == sb.keys() and all(torch.equal(sa[k].y, sb[k].y) for k in sa)


def test_tensor_datasets_build_the_pair_the_same_arrays_build():
    xs, ys, xt, yt = _arrays()
    want = DomainPair(xs, ys, xt)
    _same(DomainPair(TensorDataset(xs, ys), target_x=TensorDataset(xt)), want)  # target yields (x,)
    _same(DomainPair(TensorDataset(xs, ys), TensorDataset(xt, yt)), want)  # (source, target); target labels unread
    assert not DomainPair(TensorDataset(xs, ys), TensorDataset(xt, yt)).has_target_labels
    # target_y="dataset": the target Dataset's second element, for scoring only, as target_y=yt does
    _same(DomainPair(TensorDataset(xs, ys), TensorDataset(xt, yt), target_y="dataset"), DomainPair(xs, ys, xt, yt))


def test_a_torchvision_dataset_is_read_in_index_order():
    datasets = pytest.importorskip("torchvision.datasets")
    transforms = pytest.importorskip("torchvision.transforms")
    ds = datasets.FakeData(size=24, image_size=(1, 8, 8), num_classes=3, transform=transforms.ToTensor(),
                           random_offset=0)
    x, y = read_dataset(ds, "source", labelled=True)
    want = [ds[i] for i in range(len(ds))]  # torchvision's own __getitem__, sample by sample
    assert torch.equal(x, torch.stack([w[0] for w in want])) and y.tolist() == [int(w[1]) for w in want]
    pair = DomainPair(ds, target_x=ds, source_val_fraction=0.25)
    assert pair.input_shape == (1, 8, 8) and len(pair.source_train) + len(pair.source_val) == 24


def test_what_cannot_be_read_is_refused_naming_what_to_pass():
    datasets = pytest.importorskip("torchvision.datasets")
    xs, ys, xt, _ = _arrays()
    pil = datasets.FakeData(size=4, image_size=(1, 8, 8), num_classes=2)  # no transform: PIL images
    with pytest.raises(TypeError, match=re.escape("give the dataset a transform that makes tensors, e.g. "
                                                  "torchvision.transforms.ToTensor()")):
        DomainPair(pil, target_x=xt)
    with pytest.raises(TypeError, match=re.escape("must yield (x, y) pairs (a source needs its labels)")):
        DomainPair(TensorDataset(xs), target_x=xt)

    class Stream(IterableDataset):
        def __iter__(self):
            yield from xt

    with pytest.raises(TypeError, match="iterable-style Dataset, which has no length"):
        DomainPair(xs, ys, Stream())
    with pytest.raises(TypeError, match=re.escape("source_y must be None when source_x is a Dataset")):
        DomainPair(TensorDataset(xs, ys), ys, xt)
    # the cap: 50 samples x 6 values x 4 bytes = 1200 bytes
    with pytest.raises(ValueError, match=r"holds 50 samples of shape \(2, 3\).*max_dataset_bytes"):
        DomainPair(TensorDataset(xs, ys), target_x=xt, max_dataset_bytes=1199)
    _same(DomainPair(TensorDataset(xs, ys), target_x=xt, max_dataset_bytes=1200), DomainPair(xs, ys, xt))
    with pytest.raises(ValueError, match=r"sample 1 has shape \(3,\), sample 0 \(2,\)"):
        DomainPair(_Ragged(), target_x=xt)


class _Ragged(torch.utils.data.Dataset):
    def __len__(self):
        return 2

    def __getitem__(self, i):
        return torch.zeros(2 + i), 0


def test_arrays_still_need_their_labels_and_target():
    xs, ys, xt, _ = _arrays()
    with pytest.raises(TypeError, match="DomainPair needs source labels"):
        DomainPair(xs, target_x=xt)
    with pytest.raises(TypeError, match="DomainPair needs target inputs"):
        DomainPair(xs, ys)
    with pytest.raises(TypeError, match="'dataset' with a target Dataset"):
        DomainPair(xs, ys, xt, "dataset")
