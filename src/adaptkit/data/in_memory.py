"""Read a map-style torch ``Dataset`` into memory, so that :class:`~adaptkit.data.pair.DomainPair` takes one
wherever it takes arrays: a source dataset yields ``(x, y)``, a target dataset ``x`` or ``(x, ...)``.

The whole domain is held as one float32 tensor, so reading is refused — before any sample beyond the first is
read — when the estimate ``len(dataset) × values per sample × 4 bytes`` exceeds ``max_bytes``
(:data:`MAX_BYTES` by default, ours: a quarter of a 16 GiB laptop's memory).
"""
from __future__ import annotations

import math
from typing import Any, Optional, Tuple

import numpy as np
import torch

MAX_BYTES = 4 * 2**30  # ours: the most a Dataset may take once read into memory as float32, unless raised
CHUNK = 512  # samples collated at a time


def is_dataset(obj: Any) -> bool:
    """Whether ``obj`` is a torch ``Dataset`` (map-style or iterable), as opposed to an array or tensor."""
    return isinstance(obj, torch.utils.data.Dataset)


def _sample_input(item: Any, what: str, labelled: bool) -> Any:
    if labelled:
        if not (isinstance(item, (tuple, list)) and len(item) >= 2):
            raise TypeError(f"{what} must yield (x, y) pairs (a source needs its labels); sample 0 is a "
                            f"{type(item).__name__}.")
        return item[0]
    return item[0] if isinstance(item, (tuple, list)) else item


def _check_sample(x: Any, what: str) -> Tuple[int, ...]:
    if isinstance(x, torch.Tensor):
        return tuple(x.shape)
    if isinstance(x, np.ndarray) and x.dtype.kind in "biuf":
        return x.shape
    hint = (" (a PIL image: give the dataset a transform that makes tensors, e.g. "
            "torchvision.transforms.ToTensor())") if type(x).__module__.startswith("PIL") else ""
    raise TypeError(f"{what} yields inputs of type {type(x).__module__}.{type(x).__name__}{hint}; each input must "
                    "be a tensor or a numeric numpy array.")


def read_dataset(dataset: Any, what: str, labelled: bool, max_bytes: Optional[int] = None
                 ) -> Tuple[torch.Tensor, Optional[torch.Tensor]]:
    """``(inputs, labels)`` of every sample of a map-style ``dataset``, in index order: inputs as one float32
    tensor ``(n, *sample_shape)``; labels (the second element of each sample) as int64, or ``None`` when the
    samples carry none. ``labelled``: the samples must be ``(x, y)`` (a source). Refuses, naming ``what`` and what
    to pass instead: an iterable-style dataset, an empty one, inputs that are not tensors or arrays, and a dataset
    larger in memory than ``max_bytes``.

    Example:
        >>> ds = torch.utils.data.TensorDataset(torch.zeros(5, 3), torch.arange(5))
        >>> x, y = read_dataset(ds, "source", labelled=True)
        >>> tuple(x.shape), y.tolist()
        ((5, 3), [0, 1, 2, 3, 4])
    """
    if isinstance(dataset, torch.utils.data.IterableDataset):
        raise TypeError(f"{what} is an iterable-style Dataset, which has no length to read into memory; pass a "
                        "map-style Dataset (with __len__ and __getitem__), or arrays.")
    try:
        n = len(dataset)
    except TypeError:
        raise TypeError(f"{what} is a Dataset without __len__; pass a map-style Dataset (with __len__ and "
                        "__getitem__), or arrays.") from None
    if n == 0:
        raise ValueError(f"{what} is an empty Dataset (0 samples); each domain needs at least one sample.")
    first = dataset[0]
    shape = _check_sample(_sample_input(first, what, labelled), what)
    limit = MAX_BYTES if max_bytes is None else max_bytes
    need = n * math.prod(shape) * 4
    if need > limit:
        raise ValueError(f"{what} holds {n} samples of shape {shape}: {need / 2**30:.2f} GiB as float32, more than "
                         f"the {limit / 2**30:.2f} GiB a Dataset may take in memory (max_dataset_bytes). Pass "
                         "max_dataset_bytes=<bytes> to DomainPair to allow it, or a subset "
                         "(torch.utils.data.Subset).")
    has_labels = isinstance(first, (tuple, list)) and len(first) >= 2
    xs, ys = [], []
    for start in range(0, n, CHUNK):
        items = [dataset[i] for i in range(start, min(n, start + CHUNK))]
        batch = [torch.as_tensor(_sample_input(it, what, labelled)) for it in items]
        odd = next((start + j for j, b in enumerate(batch) if tuple(b.shape) != shape), None)
        if odd is not None:
            raise ValueError(f"{what}: sample {odd} has shape {tuple(batch[odd - start].shape)}, sample 0 {shape}; "
                             "every input must have the same shape (resize or crop them in the dataset's transform).")
        xs.append(torch.stack(batch).float())
        if has_labels:
            ys.append(torch.as_tensor(np.asarray([np.asarray(it[1]).item() for it in items])))
    x = torch.cat(xs)
    return x, (torch.cat(ys) if has_labels else None)


def from_datasets(source_x: Any, source_y: Any, target_x: Any, target_y: Any, max_bytes: Optional[int] = None):
    """:class:`~adaptkit.data.pair.DomainPair`'s inputs with any ``Dataset`` among them read into memory:
    ``(source_x, source_y, target_x, target_y)`` as arrays or tensors. Refuses a missing or doubled argument,
    naming what to pass."""
    if is_dataset(source_x) and is_dataset(source_y) and target_x is None:  # DomainPair(source_ds, target_ds)
        source_y, target_x = None, source_y
    if is_dataset(source_x):
        if source_y is not None:
            raise TypeError("source_y must be None when source_x is a Dataset: its samples are (x, y) pairs, "
                            "e.g. DomainPair(source_dataset, target_x=target_dataset).")
        source_x, source_y = read_dataset(source_x, "the source Dataset", True, max_bytes)
    elif source_y is None:
        raise TypeError("DomainPair needs source labels: pass source_x and source_y (arrays), or a source "
                        "Dataset of (x, y) samples as source_x.")
    elif is_dataset(source_y):
        raise TypeError("source_y is a Dataset; pass the source Dataset of (x, y) samples as source_x and the "
                        "target as target_x: DomainPair(source_dataset, target_x=target_dataset).")
    if target_x is None:
        raise TypeError("DomainPair needs target inputs: pass target_x (an array, or a Dataset yielding x or "
                        "(x, ...)).")
    if is_dataset(target_x):
        target_x, labels = read_dataset(target_x, "the target Dataset", False, max_bytes)
        if isinstance(target_y, str) and target_y == "dataset":
            if labels is None:
                raise ValueError("target_y='dataset' reads the target labels from the target Dataset's samples, "
                                 "but they are inputs alone, not (x, y) pairs.")
            target_y = labels
    if isinstance(target_y, str):
        raise TypeError(f"target_y must be labels (an array, -1 for unknown), None, or 'dataset' with a target "
                        f"Dataset. Got {target_y!r} instead.")
    return source_x, source_y, target_x, target_y
