"""Data that does not fit in memory: a :class:`DatasetPair` of map-style torch ``Dataset``\\ s, read through a
``DataLoader`` with worker processes.

The batches are the in-memory path's, sample for sample. :class:`StreamingBatches` draws its indices from the same
seeded index streams as :class:`~adaptkit.data.batches.PairedBatches` (``batches._Stream``: one shuffled order per
pass and per domain, cycling independently, a batch larger than a domain wrapping around), so a run on a
``DatasetPair`` and a run on a ``DomainPair`` holding the same splits draw the same samples in the same order and
train to the same weights. Workers only *fetch*: the main process decides which samples come next.

Resuming is exact. Workers fetch ahead of training (``prefetch`` batches each), so the position a checkpoint
saves is not the sampler's but that of the batches *consumed* by training: a second pair of index streams advances
once per batch handed to the loop (and checks that it is the batch it expected). A dataset whose transform draws
random numbers draws them from the torch generator seeded per batch (from the run's seed and the batch's number,
in whichever process fetches it), so augmentations too are the same with any number of workers and after a resume.

Evaluation streams as well: the scoring sets are read in order, ``eval_batch_size`` samples at a time. What the
post-training steps (label-shift estimate, diagnostics) and ``class_weights=estimated`` fit on raw inputs is
taken from the first ``sample_rows`` samples of each split (:meth:`DatasetPair.in_memory_sample`).

Example:
    >>> import torch
    >>> from torch.utils.data import TensorDataset
    >>> src = TensorDataset(torch.randn(50, 2), torch.arange(50) % 2)
    >>> pair = DatasetPair(src, TensorDataset(torch.randn(40, 2)), n_classes=2)
    >>> b = StreamingBatches(pair.source_train, pair.training_target(), batch_size=8, seed=0).next()
    >>> tuple(b.x_src.shape), tuple(b.x_tgt.shape)
    ((8, 2), (8, 2))
"""
from __future__ import annotations

from typing import Any, Dict, Iterator, Optional, Sequence

import torch
from torch.utils.data import DataLoader, Dataset, TensorDataset

from .batches import Batch, _Stream
from .pair import UNLABELLED, LabelledSet

_SEED_STRIDE = 1_000_003  # batch k of a run with seed s seeds its fetch with s * stride + k (a prime: ours)


def _inputs(x, what: str) -> torch.Tensor:
    t = torch.as_tensor(x)
    if t.is_complex() or not (t.is_floating_point() or t.dtype in (torch.uint8, torch.int8, torch.int16,
                                                                     torch.int32, torch.int64)):
        raise TypeError(f"{what} must be a real-valued tensor or array; got dtype {t.dtype}.")
    return t.to(torch.float32)


def _item_parts(item, what: str, labelled: bool):
    """``(x, y, w)`` of one dataset item (``y``/``w`` None when absent)."""
    if not isinstance(item, (tuple, list)):
        if labelled:
            raise ValueError(f"{what} must yield (x, y) or (x, y, w) items; got a {type(item).__name__}.")
        return item, None, None
    if labelled and len(item) not in (2, 3):
        raise ValueError(f"{what} must yield (x, y) or (x, y, w) items; got a tuple of {len(item)}.")
    if not labelled:
        return item[0], None, None  # anything after x (a label) stays in the dataset
    return item[0], item[1], (item[2] if len(item) == 3 else None)


def _collate(items, what: str, labelled: bool):
    parts = [_item_parts(it, what, labelled) for it in items]
    x = torch.stack([_inputs(p[0], what) for p in parts])
    if not labelled:
        return x
    y = torch.tensor([int(p[1]) for p in parts], dtype=torch.int64)
    ws = [p[2] for p in parts]
    if all(w is None for w in ws):
        return x, y, None
    if any(w is None for w in ws):
        raise ValueError(f"{what}: some items carry a weight and some do not; give every item (x, y, w) or none.")
    return x, y, torch.tensor([float(w) for w in ws], dtype=torch.float32)


class _InputsOnly(Dataset):
    """A domain's inputs only: whatever else its items carry (target labels) never leaves ``__getitem__``."""

    def __init__(self, data: Dataset):
        self.data = data

    def __len__(self) -> int:
        return len(self.data)

    def __getitem__(self, i):
        return _item_parts(self.data[i], "target", labelled=False)[0]


class _PairedFetch(Dataset):
    """Index ``(k, source indices, target indices)`` → batch ``k`` as tensors, fetched under a generator seeded for
    batch ``k`` (the caller's random state is left as it was)."""

    def __init__(self, source: Dataset, target: Dataset, seed: int):
        self.source, self.target, self.seed = source, target, seed
        plain = lambda ds: isinstance(ds.data if isinstance(ds, _InputsOnly) else ds, TensorDataset)  # noqa: E731
        self.draws_nothing = plain(source) and plain(target)  # indexing tensors draws no random numbers

    def __getitem__(self, index):
        k, i, j = index
        if self.draws_nothing:
            return (k, i, j) + _rows(self.source, i, "the source dataset", labelled=True) \
                + (_rows(self.target, j, "the target dataset", labelled=False),)
        with torch.random.fork_rng(devices=[]):
            # the CPU generator only: torch.manual_seed would also queue a CUDA seeding, which records a stack
            # trace each call (about 1 ms, 18x the cost of an in-memory batch)
            torch.default_generator.manual_seed(self.seed * _SEED_STRIDE + k)
            xs, ys, ws = _rows(self.source, i, "the source dataset", labelled=True)
            xt = _rows(self.target, j, "the target dataset", labelled=False)
        return k, i, j, xs, ys, ws, xt


def _rows(ds: Dataset, idx: torch.Tensor, what: str, labelled: bool):
    """Items ``idx`` of ``ds`` collated; a ``TensorDataset`` (or the inputs of one) is indexed in one go (the same
    values as item by item: rows copied, cast as :func:`_collate` casts them)."""
    inner = ds.data if isinstance(ds, _InputsOnly) else ds
    if isinstance(inner, TensorDataset) and (len(inner.tensors) in (2, 3) or not labelled):
        t = inner.tensors
        x = _inputs(t[0][idx], what)
        if not labelled:
            return x
        return x, t[1][idx].to(torch.int64), (t[2][idx].to(torch.float32) if len(t) == 3 else None)
    return _collate([ds[int(a)] for a in idx], what, labelled)


class _PairedIndices:
    """The endless sequence of ``(k, source indices, target indices)`` from saved stream states (the sampler runs
    ahead of training, in the main process)."""

    def __init__(self, source: dict, target: dict, sizes, batch_size: int, start: int):
        self.states, self.sizes, self.batch_size, self.start = (source, target), sizes, batch_size, start

    def __iter__(self) -> Iterator:
        streams = []
        for state, n in zip(self.states, self.sizes):
            s = _Stream(n, self.batch_size, 0, "cpu")
            s.load_state_dict(state)
            streams.append(s)
        k = self.start
        while True:
            yield k, streams[0].next(), streams[1].next()
            k += 1


class StreamingBatches:
    """Paired batches read from two map-style datasets through one ``DataLoader``; the same batches as
    :class:`~adaptkit.data.batches.PairedBatches` over the same samples and seed, with any number of workers.

    Args:
        source: items ``(x, y)`` or ``(x, y, w)`` (``w``: a per-sample weight).
        target: items ``x`` (see :meth:`DatasetPair.training_target`: target labels removed).
        batch_size, seed: as for ``PairedBatches`` (the same seeds give the same indices).
        device: where batches go; pinned host memory and non-blocking copies when it is CUDA.
        workers: loader worker processes (0: fetch in this process). Results do not depend on it.
        prefetch: batches each worker fetches ahead.
        class_ratios: per-class factors multiplied into the source weights (``class_weights``), as
            ``run.with_class_weights`` does in memory.
        n_classes: when given, every source label is checked to lie in ``0..n_classes-1``.
    """

    def __init__(self, source: Dataset, target: Dataset, batch_size: int, seed: int, device="cpu", workers: int = 0,
                 prefetch: int = 2, class_ratios: Optional[Sequence[float]] = None, n_classes: Optional[int] = None):
        self.device = torch.device(device)
        self.sizes = (len(source), len(target))
        for name, n in zip(("source", "target"), self.sizes):
            if n == 0:
                raise ValueError(f"the {name} dataset is empty (0 samples); each domain needs at least one sample.")
        self.batch_size, self.seed, self.workers, self.prefetch = batch_size, seed, workers, prefetch
        self.n_classes = n_classes
        self.ratios = None if class_ratios is None else torch.as_tensor(list(class_ratios), dtype=torch.float32)
        self.fetch = _PairedFetch(source, target, seed)
        # the positions of the batches consumed by training: what a checkpoint saves
        self.src = _Stream(self.sizes[0], batch_size, seed * 2 + 1, "cpu")
        self.tgt = _Stream(self.sizes[1], batch_size, seed * 2 + 2, "cpu")
        self.drawn = 0
        self._it: Optional[Iterator] = None

    def _start(self) -> Iterator:
        sampler = _PairedIndices(self.src.state_dict(), self.tgt.state_dict(), self.sizes, self.batch_size,
                                 self.drawn)
        pin = self.device.type == "cuda"
        if self.workers == 0 and not pin:  # fetched here, batch by batch: the DataLoader would add only overhead
            return (self.fetch[index] for index in sampler)
        more = {"prefetch_factor": self.prefetch} if self.workers > 0 else {}
        loader = DataLoader(self.fetch, batch_size=None, sampler=sampler, num_workers=self.workers,
                            pin_memory=pin, collate_fn=_as_is, generator=torch.Generator().manual_seed(self.seed),
                            **more)  # a generator of its own: creating the iterator leaves the global RNG alone
        return iter(loader)

    def next(self) -> Batch:
        if self._it is None:
            self._it = self._start()
        k, i, j, xs, ys, ws, xt = next(self._it)
        assert k == self.drawn and torch.equal(i, self.src.next()) and torch.equal(j, self.tgt.next())  # in order
        self.drawn += 1
        if self.n_classes is not None and (int(ys.min()) < 0 or int(ys.max()) >= self.n_classes):
            bad = [int(a) for a, y in zip(i, ys) if not 0 <= int(y) < self.n_classes][:5]
            raise ValueError(f"the source dataset's items {bad} have labels outside 0..{self.n_classes - 1} "
                             f"(got {sorted({int(y) for y in ys if not 0 <= int(y) < self.n_classes})}); every "
                             "source item needs a class label.")
        if self.ratios is not None:
            r = self.ratios[ys]
            ws = r if ws is None else r * ws
        nb = self.device.type == "cuda"
        to = lambda t: None if t is None else t.to(self.device, non_blocking=nb)  # noqa: E731
        return Batch(to(xs), to(ys), to(xt), to(ws))

    def close(self) -> None:
        """End the worker processes (they also end when this object is collected)."""
        self._it = None

    def state_dict(self) -> dict:
        return {"source": self.src.state_dict(), "target": self.tgt.state_dict(), "drawn": self.drawn}

    def load_state_dict(self, s: dict) -> None:
        """Restore consumed positions saved by :meth:`state_dict`, after checking them against the data
        (ValueError naming the field, e.g. ``'source.pos' is 1000000; accepted: an integer in [0, 40]``)."""
        if not isinstance(s, dict) or set(s) != {"source", "target", "drawn"}:
            raise ValueError(f"the streaming batch state must be a dict with 'source', 'target' and 'drawn'; got "
                             f"{sorted(s) if isinstance(s, dict) else type(s).__name__}")
        self.src.check_state(s["source"], "source")
        self.tgt.check_state(s["target"], "target")
        drawn = s["drawn"]
        if isinstance(drawn, bool) or not isinstance(drawn, int) or drawn < 0:
            raise ValueError(f"'drawn' is {drawn!r}; accepted: an integer >= 0 (batches consumed so far)")
        self.close()
        self.src.load_state_dict(s["source"])
        self.tgt.load_state_dict(s["target"])
        self.drawn = drawn


def _as_is(batch):
    return batch


class _InOrder:
    """``(x, y, w)`` batches of a labelled dataset in order, read in this process (what a ``DataLoader`` without
    workers yields, without its per-item collation for a ``TensorDataset``)."""

    def __init__(self, ds: Dataset, size: int, what: str):
        self.ds, self.size, self.what = ds, size, what

    def __iter__(self):
        n = len(self.ds)
        for a in range(0, n, self.size):
            yield _rows(self.ds, torch.arange(a, min(a + self.size, n)), self.what, labelled=True)


class _KnownLabels:
    """Batches ``(x, y)`` of a labelled dataset in order, rows with the unknown label (-1) dropped."""

    def __init__(self, loader: DataLoader):
        self.loader = loader

    def __iter__(self):
        for x, y, _ in self.loader:
            known = y != UNLABELLED
            if bool(known.all()):
                yield x, y
            elif bool(known.any()):
                yield x[known], y[known]


class _LabelledCollate:
    def __init__(self, what: str):
        self.what = what

    def __call__(self, items):
        return _collate(items, self.what, labelled=True)


class DatasetPair:
    """A labelled source and an unlabelled target given as map-style torch ``Dataset``\\ s, already split: for data
    read from disk batch by batch (``adaptkit.fit(DatasetPair(...), loader_workers=4)``).

    Args:
        source: source training items ``(x, y)`` or ``(x, y, w)``; labels in ``0..n_classes-1``.
        target: target training items ``x``, or tuples whose first item is ``x`` (a label there is never read).
        source_val: labelled source items for validation and the label-free scores (optional).
        target_test: labelled target items ``(x, y)`` for scoring only (``y == -1``: unknown, skipped; optional).
        n_classes: the number of classes (default: ``len(source.classes)``, as torchvision's ``ImageFolder`` has).
        name: a label for reports.
        eval_batch_size: samples per batch when evaluating.
        sample_rows: how many first samples of each split :meth:`in_memory_sample` reads.

    Example:
        >>> import torch
        >>> from torch.utils.data import TensorDataset
        >>> pair = DatasetPair(TensorDataset(torch.randn(50, 3), torch.arange(50) % 2),
        ...                    TensorDataset(torch.randn(40, 3)), n_classes=2)
        >>> pair
        DatasetPair('dataset', input_shape=(3,), n_classes=2, source_train=50, source_val=0, target_train=40, target_test=0)
    """

    def __init__(self, source: Dataset, target: Dataset, *, source_val: Optional[Dataset] = None,
                 target_test: Optional[Dataset] = None, n_classes: Optional[int] = None, name: str = "dataset",
                 eval_batch_size: int = 1024, sample_rows: int = 2000):
        if n_classes is None:
            classes = getattr(source, "classes", None)
            if classes is None:
                raise ValueError("DatasetPair needs n_classes= (the number of classes): the source dataset has no "
                                 "'classes' attribute to read it from.")
            n_classes = len(classes)
        if isinstance(n_classes, bool) or not isinstance(n_classes, int) or n_classes < 1:
            raise ValueError(f"The 'n_classes' parameter of DatasetPair must be an integer >= 1; got {n_classes!r}.")
        self.name, self.n_classes = name, n_classes
        self.eval_batch_size, self.sample_rows = eval_batch_size, sample_rows
        self.source_train, self.target_train = source, target
        self.source_val, self.target_test = source_val, target_test
        shapes = {}
        for what, ds, labelled in (("source", source, True), ("target", target, False),
                                   ("source_val", source_val, True), ("target_test", target_test, True)):
            if ds is None or (what in ("source_val", "target_test") and len(ds) == 0):
                continue
            if len(ds) == 0:
                raise ValueError(f"the {what} dataset is empty (0 samples); each domain needs at least one sample.")
            x = _inputs(_item_parts(ds[0], f"the {what} dataset", labelled)[0], f"the {what} dataset")
            shapes[what] = tuple(x.shape)
        self.input_shape = shapes["source"]
        bad = {w: s for w, s in shapes.items() if s != self.input_shape}
        if bad:
            raise ValueError(f"every dataset's samples must have the source's shape {self.input_shape}; got "
                             + ", ".join(f"{w} {s}" for w, s in bad.items())
                             + ". Give the datasets a transform that puts them on one shape.")

    @property
    def has_target_labels(self) -> bool:
        return self.target_test is not None and len(self.target_test) > 0

    def training_target(self) -> Dataset:
        """The target training inputs, without anything else their items carry."""
        return _InputsOnly(self.target_train)

    def _loader(self, ds: Dataset, workers: int, pin: bool):
        if workers == 0 and not pin:  # read in this process: slices in order, a TensorDataset's in one go
            return _InOrder(ds, self.eval_batch_size, f"the {self.name!r} scoring set")
        return DataLoader(ds, batch_size=self.eval_batch_size, shuffle=False, num_workers=workers, pin_memory=pin,
                          collate_fn=_LabelledCollate(f"the {self.name!r} scoring set"),
                          persistent_workers=workers > 0, generator=torch.Generator().manual_seed(0))

    def scoring_sets(self, workers: int = 0, pin: bool = False) -> Dict[str, Any]:
        """Labelled sets for evaluation, each an iterable of ``(x, y)`` batches read in order (never
        materialised): ``source_val`` and ``target_test`` when given and not empty."""
        sets = {}
        for name, ds in (("source_val", self.source_val), ("target_test", self.target_test)):
            if ds is not None and len(ds):
                sets[name] = _KnownLabels(self._loader(ds, workers, pin))
        return sets

    def target_inputs(self, rows: int) -> torch.Tensor:
        """The first ``rows`` target training inputs as one tensor (what the label-free scores use)."""
        t = self.training_target()
        return torch.stack([_inputs(t[i], "the target dataset") for i in range(min(rows, len(t)))])

    def in_memory_sample(self) -> "SampledPair":
        """The first ``sample_rows`` samples of each split, in memory: what the post-training steps and
        ``class_weights=estimated`` fit on raw inputs."""
        def labelled(ds) -> LabelledSet:
            if ds is None or len(ds) == 0:
                return LabelledSet(torch.zeros((0, *self.input_shape)), torch.zeros(0, dtype=torch.int64))
            x, y, _ = _collate([ds[i] for i in range(min(self.sample_rows, len(ds)))], self.name, labelled=True)
            return LabelledSet(x, y)

        return SampledPair(self, labelled(self.source_train), labelled(self.source_val),
                           self.target_inputs(self.sample_rows), labelled(self.target_test))

    def describe(self) -> Dict[str, Any]:
        """The data entry a run's config records (its shape enters the config hash)."""
        return {"name": self.name, "input_shape": list(self.input_shape), "n_classes": self.n_classes,
                "n_source_train": len(self.source_train), "n_target_train": len(self.target_train)}

    def __repr__(self) -> str:
        n = lambda ds: 0 if ds is None else len(ds)  # noqa: E731
        return (f"DatasetPair({self.name!r}, input_shape={self.input_shape}, n_classes={self.n_classes}, "
                f"source_train={n(self.source_train)}, source_val={n(self.source_val)}, "
                f"target_train={n(self.target_train)}, target_test={n(self.target_test)})")


class SampledPair:
    """The in-memory face of the first samples of a :class:`DatasetPair` (what ``DomainPair`` offers the
    post-training steps: ``source_train``, ``source_val``, ``target_train_x``, ``scoring_sets()``)."""

    def __init__(self, pair: DatasetPair, source_train: LabelledSet, source_val: LabelledSet,
                 target_train_x: torch.Tensor, target_test: LabelledSet):
        self.name, self.n_classes, self.input_shape = pair.name, pair.n_classes, pair.input_shape
        self.source_train, self.source_val, self.target_train_x = source_train, source_val, target_train_x
        known = target_test.y != UNLABELLED
        self.__target_test = LabelledSet(target_test.x[known], target_test.y[known])
        self.target_test_x = target_test.x

    @property
    def has_target_labels(self) -> bool:
        return len(self.__target_test) > 0

    def scoring_sets(self) -> Dict[str, LabelledSet]:
        sets = {"source_val": self.source_val} if len(self.source_val) else {}
        if len(self.__target_test):
            sets["target_test"] = self.__target_test
        return sets


def streaming_parts(c, pair: DatasetPair, method, device, class_weights: Optional[Dict[str, Any]]):
    """The batches and the evaluator of a run (settings ``c``) on a :class:`DatasetPair`: what ``run.prepare``
    builds for a ``DomainPair`` (PairedBatches, Evaluator), read through ``DataLoader``\\ s with
    ``c.loader_workers`` workers."""
    from ..train.evaluate import Evaluator

    if method.uses_target_labels:
        raise ValueError(f"method {method.name!r} trains on target labels, which a DatasetPair does not give to "
                         "training; use a DomainPair with target labels for the target oracle.")
    device = torch.device(device)
    pin = device.type == "cuda"
    batches = StreamingBatches(pair.source_train, pair.training_target(), c.batch_size, c.seed, device,
                               workers=c.loader_workers, n_classes=pair.n_classes,
                               class_ratios=None if class_weights is None else class_weights["ratios"])
    max_unlabelled = 2000  # Evaluator's default cap on the target samples the scores use
    target = pair.target_inputs(max_unlabelled) if c.scores else None
    evaluator = Evaluator(pair.scoring_sets(c.loader_workers, pin), target, device, batch_size=pair.eval_batch_size,
                          scores=c.scores, max_unlabelled=max_unlabelled)
    return batches, evaluator
