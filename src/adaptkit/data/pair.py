"""DomainPair: a labelled source domain and an unlabelled target domain, already split.

Target labels, when they are known at all, are kept for *scoring only*. That is structural, not a convention:
the training loop is handed a :class:`TrainingData`, a frozen record with fields for source inputs, source
labels, optional source weights and target inputs — it has no field in which a target label could travel.
Only :meth:`DomainPair.scoring_sets` (used by evaluation and reports) ever returns target labels.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Dict, Optional, Tuple

import numpy as np
import torch

UNLABELLED = -1  # the one sentinel for "no label" (scikit-learn's semi-supervised convention)


@dataclass(frozen=True)
class LabelledSet:
    x: torch.Tensor  # (N, *input_shape) float32
    y: torch.Tensor  # (N,) int64 in 0..K-1

    def __len__(self) -> int:
        return int(self.x.shape[0])


@dataclass(frozen=True)
class TrainingData:
    """Everything the training loop may see. There is deliberately no ``target_y`` field."""

    source_x: torch.Tensor  # (Ns, *input_shape)
    source_y: torch.Tensor  # (Ns,) int64
    target_x: torch.Tensor  # (Nt, *input_shape)
    source_w: Optional[torch.Tensor] = None  # (Ns,) per-sample weights, None = uniform

    def __post_init__(self):
        names = {f.name for f in dataclasses.fields(self)}
        assert not any(n.startswith("target_y") for n in names)  # internal invariant, see module docstring


def _as_float_tensor(x, what: str) -> torch.Tensor:
    if isinstance(x, torch.Tensor):
        t = x.detach().cpu()
    else:
        a = np.asarray(x)
        if a.dtype == object or a.dtype.kind in "USV":
            raise TypeError(f"{what} must be numeric; got an array of dtype {a.dtype}.")
        if a.dtype.kind == "c":
            raise TypeError(f"{what} must be real-valued; got complex dtype {a.dtype}.")
        if a.dtype.kind == "f" and a.dtype.itemsize > 4:  # only wider floats can exceed float32's range
            _check_float32_range(a[np.isfinite(a)], what)
        t = torch.from_numpy(np.array(a, dtype=np.float32, copy=True))
    if t.dtype.is_complex:
        raise TypeError(f"{what} must be real-valued; got complex dtype {t.dtype}.")
    if t.dtype == torch.float64:
        _check_float32_range(t[torch.isfinite(t)].numpy(), what)
    t = t.to(torch.float32).contiguous()
    if t.ndim < 2:
        raise ValueError(f"{what} must have shape (n_samples, n_features, ...); got shape {tuple(t.shape)}. "
                         "Reshape a single feature with x.reshape(-1, 1).")
    if t.shape[0] == 0:
        raise ValueError(f"{what} is empty (0 samples); each domain needs at least one sample.")
    if not torch.isfinite(t).all():
        bad = int((~torch.isfinite(t)).sum())
        raise ValueError(f"{what} contains {bad} NaN or infinite value(s); clean or impute them first.")
    return t


def _check_float32_range(finite_values: np.ndarray, what: str) -> None:
    """Finite values beyond float32's range would silently become inf in the cast (NaN/inf are reported later)."""
    largest = float(np.abs(finite_values).max()) if finite_values.size else 0.0
    if largest > float(np.finfo(np.float32).max):
        raise ValueError(f"{what} holds values too large for float32 (max |x| = {largest:.3g} > "
                         f"{float(np.finfo(np.float32).max):.3g}), the precision training runs in. Scale the features.")


def _as_label_tensor(y, n: int, what: str) -> torch.Tensor:
    a = y.detach().cpu().numpy() if isinstance(y, torch.Tensor) else np.asarray(y)
    if a.ndim != 1:
        raise ValueError(f"{what} must be 1-D with one label per sample; got shape {a.shape}.")
    if a.shape[0] != n:
        raise ValueError(f"{what} has {a.shape[0]} labels for {n} samples; lengths must match.")
    if a.dtype.kind == "b" or a.dtype.kind not in "iuf":
        raise TypeError(f"{what} must hold integer class labels 0..K-1; got dtype {a.dtype}.")
    if a.dtype.kind == "f":
        if not np.all(np.isfinite(a)) or not np.all(a == np.round(a)):
            raise ValueError(f"{what} must hold integer class labels 0..K-1; got non-integer values.")
    return torch.from_numpy(a.astype(np.int64))


def _split(n: int, fraction: float, seed: int, y: Optional[np.ndarray] = None) -> Tuple[np.ndarray, np.ndarray]:
    """Return (keep, held_out) index arrays; stratified by ``y`` when given (every class keeps a sample)."""
    rng = np.random.default_rng(seed)
    if fraction <= 0 or n < 2:
        return np.arange(n), np.arange(0)
    if y is None:
        perm = rng.permutation(n)
        k = min(max(1, int(round(fraction * n))), n - 1)
        return np.sort(perm[k:]), np.sort(perm[:k])
    keep, held = [], []
    for c in np.unique(y):
        idx = rng.permutation(np.flatnonzero(y == c))
        k = min(int(round(fraction * len(idx))), len(idx) - 1)
        held.append(idx[:k])
        keep.append(idx[k:])
    return np.sort(np.concatenate(keep)), np.sort(np.concatenate(held))


class DomainPair:
    """A labelled source domain and an unlabelled target domain, split for training and scoring.

    Args:
        source_x: source inputs, shape ``(Ns, *input_shape)``; or a map-style torch ``Dataset`` of ``(x, y)``
            samples (then ``source_y`` stays ``None``), read into memory (:mod:`adaptkit.data.in_memory`).
        source_y: source labels in ``0..K-1``, shape ``(Ns,)``. Every class must appear.
        target_x: target inputs, shape ``(Nt, *input_shape)`` (same ``input_shape``); or a map-style ``Dataset``
            yielding ``x`` or ``(x, ...)`` (only ``x`` is read, unless ``target_y="dataset"``).
        target_y: target labels, or ``None`` when unknown. Used for scoring only; ``-1`` marks unknown rows.
            ``"dataset"``: the second element of each sample of a target ``Dataset``.
        max_dataset_bytes: the most a ``Dataset`` may take once read, as float32 (default 4 GiB).
        name: a label for reports.
        source_val_fraction: share of the source held out (stratified) for validation.
        target_test_fraction: share of the target held out for scoring; 0 trains on the whole target
            (transductive) and scores nothing.
        split_seed: seed of both splits.

    Example:
        >>> import numpy as np
        >>> rng = np.random.default_rng(0)
        >>> pair = DomainPair(rng.normal(size=(40, 2)), np.arange(40) % 2, rng.normal(size=(30, 2)) + 1)
        >>> len(pair.source_train), len(pair.source_val), pair.n_classes
        (32, 8, 2)
    """

    def __init__(self, source_x, source_y=None, target_x=None, target_y=None, *, name: str = "custom",
                 source_val_fraction: float = 0.2, target_test_fraction: float = 0.3, split_seed: int = 0,
                 source_w=None, max_dataset_bytes: Optional[int] = None):
        from .._checks import check_number
        from .in_memory import from_datasets

        source_x, source_y, target_x, target_y = from_datasets(source_x, source_y, target_x, target_y,
                                                               max_dataset_bytes)

        check_number("source_val_fraction", "DomainPair", source_val_fraction, low=0, high=1, high_open=True)
        check_number("target_test_fraction", "DomainPair", target_test_fraction, low=0, high=1, high_open=True)
        sx = _as_float_tensor(source_x, "source_x")
        tx = _as_float_tensor(target_x, "target_x")
        if sx.shape[1:] != tx.shape[1:]:
            raise ValueError(f"source and target inputs must have the same shape per sample; got source "
                             f"{tuple(sx.shape[1:])} and target {tuple(tx.shape[1:])}.")
        sy = _as_label_tensor(source_y, sx.shape[0], "source_y")
        if (sy < 0).any():
            raise ValueError("source_y must hold class labels 0..K-1 for every source sample; got "
                             f"{int((sy < 0).sum())} negative label(s). Unlabelled rows belong in the target.")
        k = int(sy.max()) + 1
        missing = sorted(set(range(k)) - set(sy.unique().tolist()))
        if missing:
            raise ValueError(f"source_y must contain every class 0..{k - 1}; class(es) {missing} are missing "
                             "from the source. Relabel the classes to 0..K-1.")
        ty = None
        if target_y is not None:
            ty = _as_label_tensor(target_y, tx.shape[0], "target_y")
            bad = sorted(set(ty[(ty != UNLABELLED)].tolist()) - set(range(k)))
            if bad or (ty < UNLABELLED).any():
                raise ValueError(f"target_y holds labels {bad or sorted(set(ty[ty < -1].tolist()))} that the "
                                 f"source does not have; accepted are 0..{k - 1} and -1 (unknown).")
        sw = None
        if source_w is not None:
            sw = _as_float_tensor(np.asarray(source_w, dtype=np.float64).reshape(-1, 1), "source_w").reshape(-1)
            if sw.shape[0] != sx.shape[0] or (sw < 0).any():
                raise ValueError("source_w must hold one non-negative weight per source sample.")

        self.name = name
        self.n_classes = k
        self.input_shape = tuple(sx.shape[1:])
        s_keep, s_val = _split(sx.shape[0], source_val_fraction, split_seed, sy.numpy())
        t_keep, t_test = _split(tx.shape[0], target_test_fraction, split_seed + 1)
        self.source_train = LabelledSet(sx[s_keep], sy[s_keep])
        self.source_val = LabelledSet(sx[s_val], sy[s_val])
        self._source_train_w = None if sw is None else sw[s_keep]
        self.target_train_x = tx[t_keep]
        self.target_test_x = tx[t_test]
        # Kept apart; read only through scoring_sets()/target_labels_for_oracle().
        self.__target_train_y = None if ty is None else ty[t_keep]
        self.__target_test_y = None if ty is None else ty[t_test]

    # -- what training may see ------------------------------------------------------------------------------
    def training_data(self) -> TrainingData:
        """Source inputs and labels, target inputs. No target label can travel in it."""
        return TrainingData(self.source_train.x, self.source_train.y, self.target_train_x, self._source_train_w)

    # -- scoring only -----------------------------------------------------------------------------------
    @property
    def has_target_labels(self) -> bool:
        return self.__target_test_y is not None and bool((self.__target_test_y != UNLABELLED).any())

    def scoring_sets(self) -> Dict[str, LabelledSet]:
        """Labelled sets for evaluation: ``source_val`` (when not empty) and, when labels are known,
        ``target_test`` (rows with unknown labels dropped). Never passed to the loop's updates."""
        sets = {"source_val": self.source_val} if len(self.source_val) else {}
        if self.__target_test_y is not None:
            known = self.__target_test_y != UNLABELLED
            if known.any():
                sets["target_test"] = LabelledSet(self.target_test_x[known], self.__target_test_y[known])
        return sets

    def oracle_training_data(self) -> TrainingData:
        """Target inputs *with their labels* posing as the source: only for the target-oracle upper bound,
        which is never a deployable method."""
        y = self.__target_train_y
        if y is None or not (y != UNLABELLED).any():
            raise ValueError(f"The target oracle needs target labels, but DomainPair {self.name!r} has none.")
        known = y != UNLABELLED
        x = self.target_train_x[known]
        return TrainingData(x, y[known], self.target_train_x)

    def __repr__(self) -> str:
        return (f"DomainPair({self.name!r}, input_shape={self.input_shape}, n_classes={self.n_classes}, "
                f"source_train={len(self.source_train)}, source_val={len(self.source_val)}, "
                f"target_train={len(self.target_train_x)}, target_test={len(self.target_test_x)}, "
                f"target_labels={'yes' if self.has_target_labels else 'no'})")
