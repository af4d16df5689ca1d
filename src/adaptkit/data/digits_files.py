"""The digit benchmarks from their own files on local disk: MNIST (IDX files), USPS (LIBSVM's bz2 files) and SVHN
(``.mat`` files), read by torchvision's dataset classes with downloading off. Nothing downloads, ever.

Where the files go — what ``torchvision.datasets.MNIST/USPS/SVHN(root, download=True)`` would leave behind, so a
folder filled once by torchvision on a machine with internet serves as it is:

=======  =====================================================================================================
MNIST    ``<root>/MNIST/raw/``: ``train-images-idx3-ubyte``, ``train-labels-idx1-ubyte``, ``t10k-images-idx3-ubyte``,
         ``t10k-labels-idx1-ubyte`` (gunzipped; torchvision wants all four whichever split is read)
USPS     ``<root>/``: ``usps.bz2`` (train, 7291 digits) and ``usps.t.bz2`` (test), as LIBSVM publishes them
SVHN     ``<root>/``: ``train_32x32.mat``, ``test_32x32.mat`` (``extra_32x32.mat``), the cropped-digit files
=======  =====================================================================================================

A missing file fails in one line naming the file, the folder looked in and where to get it
(:class:`MissingDataFile`, a ``FileNotFoundError`` and a ``ValueError``, so the commands report it as a bad setting).

Both domains are put on one input shape by :func:`~adaptkit.data.folders.image_transform` (grey ↔ RGB by PIL's
conversion, a resize, optional per-channel normalisation), the transform the image folders use. Labels are the
digits 0–9 in every set (torchvision maps SVHN's label 10 to 0 and USPS's 1–10 to 0–9). The ready pairs
(``data=mnist_usps``, ``usps_mnist``, ``svhn_mnist``) are registered in
:data:`~adaptkit.data.shifts.SHIFTS` by the shifts module.

Example:
    >>> pair = digit_pair("mnist", "usps", "~/digits", size=28, channels=1)  # doctest: +SKIP
    >>> pair.input_shape  # doctest: +SKIP
    (1, 28, 28)
"""
from __future__ import annotations

from pathlib import Path
from typing import List, Optional, Sequence, Tuple

import numpy as np
import torch

from .._checks import check_choice, check_number
from .folders import image_transform
from .pair import DomainPair

SPLITS = {"mnist": ("train", "test"), "usps": ("train", "test"), "svhn": ("train", "test", "extra")}
DIGIT_SETS = tuple(SPLITS)

_WHERE = {  # where each set's files come from, for the message when one is missing
    "mnist": "the MNIST database (e.g. {mirror}), gunzipped",
    "usps": "LIBSVM's multi-class data sets page ({url}), as they are (bz2)",
    "svhn": "the SVHN site ({url}), the cropped digits ('Format 2')",
}
_CLASSES = {"mnist": "MNIST", "usps": "USPS", "svhn": "SVHN"}


class MissingDataFile(FileNotFoundError, ValueError):
    """A benchmark file is not where torchvision reads it (the message names the file, the folder and the source)."""


def _torchvision_class(name: str):
    from torchvision import datasets

    return getattr(datasets, _CLASSES[name])


def expected_files(name: str, root, split: str) -> Tuple[Path, List[str]]:
    """``(folder, file names)`` that ``torchvision.datasets.<NAME>`` reads for ``split`` under ``root``, the names
    taken from torchvision's own class (MNIST: all four files, which torchvision checks whichever split is read)."""
    check_choice("name", "expected_files", name, DIGIT_SETS)
    check_choice("split", f"digit set {name!r}", split, SPLITS[name])
    root = Path(str(root)).expanduser()
    cls = _torchvision_class(name)
    if name == "mnist":
        return root / "MNIST" / "raw", [Path(f).stem for f, _ in cls.resources]  # stored gunzipped: no ".gz"
    return root, [cls.split_list[split][1]]  # USPS and SVHN: one file per split, directly under root


def _source_of(name: str, split: str) -> str:
    cls = _torchvision_class(name)
    if name == "mnist":
        return _WHERE[name].format(mirror=cls.mirrors[0])
    url = cls.split_list[split][0]
    return _WHERE[name].format(url=url.rsplit("/", 1)[0] + "/")


def check_digit_files(name: str, root, split: str) -> None:
    """Raise :class:`MissingDataFile` (one line) unless every file ``name``'s ``split`` needs is under ``root``."""
    folder, files = expected_files(name, root, split)
    cls = f"torchvision.datasets.{_CLASSES[name]}"
    for f in files:
        if not (folder / f).is_file():
            where = "" if folder.is_dir() else ", a folder that does not exist"
            raise MissingDataFile(
                f"{_CLASSES[name]} file {f!r} not found in {str(folder)!r}{where}; {cls} reads "
                f"{', '.join(files)} from that folder. Get them from {_source_of(name, split)}, and put them there, "
                f"or fill the folder once with {cls}(root={str(Path(str(root)).expanduser())!r}, download=True) on "
                "a machine with internet; adaptkit never downloads.")


class _BadChecksum(Exception):
    pass


def _dataset(name: str, root: Path, split: str, verify: bool):
    from torchvision.datasets.utils import check_integrity

    cls = _torchvision_class(name)
    if name in ("mnist", "usps"):
        return cls(str(root), train=split == "train", download=False)

    class _Unverified(cls):  # SVHN with its MD5 check done (or skipped, verify=False) by read_digits
        def _check_integrity(self) -> bool:
            return Path(self.root, self.filename).is_file()

    if verify and not check_integrity(str(root / cls.split_list[split][1]), cls.split_list[split][2]):
        raise _BadChecksum(cls.split_list[split][2])
    return _Unverified(str(root), split=split, download=False)


def read_digits(name: str, root, split: str = "train", transform=None, limit: int = 0, seed: int = 0,
                verify: bool = True) -> Tuple[torch.Tensor, torch.Tensor]:
    """``(x, y)`` of digit set ``name`` (``mnist``, ``usps``, ``svhn``), ``split`` of it, from the files under
    ``root`` (see the module docstring): ``x`` the images through ``transform`` (default: 28×28 grey in [0, 1]),
    stacked; ``y`` the digits 0–9. ``limit`` > 0 reads that many images, drawn without replacement by
    ``numpy.random.default_rng(seed)`` (in file order); ``verify`` checks SVHN's files against torchvision's MD5.

    Shape: ``x`` ``(N, C, H, W)`` float32, ``y`` ``(N,)`` int64.
    """
    check_choice("name", "read_digits", name, DIGIT_SETS)
    check_number("limit", "read_digits", limit, low=0, integer=True)
    check_digit_files(name, root, split)
    root = Path(str(root)).expanduser()
    transform = transform or image_transform(28, channels=1)
    folder, files = expected_files(name, root, split)
    try:
        ds = _dataset(name, root, split, verify)
    except _BadChecksum as e:
        raise ValueError(f"{_CLASSES[name]} file {str(folder / files[0])!r} does not match the MD5 checksum "
                         f"torchvision records for it ({e}): a partial download? Fetch it again, or read it anyway "
                         "with data.verify=false.") from None
    except Exception as e:  # noqa: BLE001 — a truncated or foreign file: torchvision's readers raise many kinds
        raise ValueError(f"{_CLASSES[name]} files {files} in {str(folder)!r} cannot be read ({type(e).__name__}: "
                         f"{str(e).splitlines()[0] if str(e) else ''}); fetch them again.") from None
    n = len(ds)
    index = np.arange(n)
    if 0 < limit < n:
        index = np.sort(np.random.default_rng(seed).choice(n, size=int(limit), replace=False))
    ds.transform = transform
    xs, ys = zip(*(ds[int(i)] for i in index))
    return torch.stack(xs), torch.tensor(ys, dtype=torch.int64)


def digit_pair(source: str, target: str, root, *, size: int = 28, channels: int = 1,
               mean: Optional[Sequence[float]] = None, std: Optional[Sequence[float]] = None,
               source_split: str = "train", target_split: str = "train", n_source: int = 0, n_target: int = 0,
               seed: int = 0, verify: bool = True, source_val_fraction: float = 0.2,
               target_test_fraction: float = 0.3, name: Optional[str] = None) -> DomainPair:
    """A :class:`DomainPair` of two digit sets read by :func:`read_digits` from ``root``, both put on
    ``(channels, size, size)`` by one :func:`~adaptkit.data.folders.image_transform` (and normalised by
    ``mean``/``std``). The target's labels are kept for scoring only. ``n_source``/``n_target`` > 0 read a seeded
    subset; ``seed`` also seeds the pair's splits."""
    owner = "digit_pair"
    for param, value in (("source", source), ("target", target)):
        check_choice(param, owner, value, DIGIT_SETS)
    check_choice("source_split", owner, source_split, SPLITS[source])
    check_choice("target_split", owner, target_split, SPLITS[target])
    seed = check_number("seed", owner, seed, low=0, integer=True)
    if root is None or str(root) == "":
        raise ValueError(f"the digit pair {source}->{target} needs data.root: the folder holding the files "
                         f"torchvision reads (e.g. data.root=~/digits; see adaptkit.data.digits_files).")
    transform = image_transform(size, channels, mean, std)
    xs, ys = read_digits(source, root, source_split, transform, n_source, seed, verify)
    xt, yt = read_digits(target, root, target_split, transform, n_target, seed + 1, verify)
    return DomainPair(xs, ys, xt, yt, name=name or f"{source}_{target}", source_val_fraction=source_val_fraction,
                      target_test_fraction=target_test_fraction, split_seed=seed)


# -- the ready pairs (data=<name>; registered by the shifts module) -------------------------------------------------
def _check_pair_files(source: str, target: str):
    def check_files(root: Optional[str] = None, source_split: str = "train", target_split: str = "train", **_):
        if root is None or str(root) == "":
            raise ValueError(f"data={source}_{target} needs data.root: the folder holding the files torchvision "
                             "reads (see adaptkit.data.digits_files).")
        check_digit_files(source, root, source_split)
        check_digit_files(target, root, target_split)
    return check_files


def mnist_usps(seed: int = 0, root: Optional[str] = None, size: int = 28, channels: int = 1,
               mean: Optional[List[float]] = None, std: Optional[List[float]] = None, n_source: int = 0,
               n_target: int = 0, source_split: str = "train", target_split: str = "train", verify: bool = True,
               source_val_fraction: float = 0.2, target_test_fraction: float = 0.3) -> DomainPair:
    """MNIST → USPS from the files under ``root``: USPS's 16×16 digits resized to MNIST's 28×28, grey (the usual
    shape of this pair: common practice). Parameters as :func:`digit_pair`."""
    return digit_pair("mnist", "usps", name="mnist_usps", **locals())  # locals(): exactly the parameters above


def usps_mnist(seed: int = 0, root: Optional[str] = None, size: int = 28, channels: int = 1,
               mean: Optional[List[float]] = None, std: Optional[List[float]] = None, n_source: int = 0,
               n_target: int = 0, source_split: str = "train", target_split: str = "train", verify: bool = True,
               source_val_fraction: float = 0.2, target_test_fraction: float = 0.3) -> DomainPair:
    """USPS → MNIST from the files under ``root``, both 28×28 grey (common practice). Parameters as
    :func:`digit_pair`."""
    return digit_pair("usps", "mnist", name="usps_mnist", **locals())


def svhn_mnist(seed: int = 0, root: Optional[str] = None, size: int = 32, channels: int = 3,
               mean: Optional[List[float]] = None, std: Optional[List[float]] = None, n_source: int = 0,
               n_target: int = 0, source_split: str = "train", target_split: str = "train", verify: bool = True,
               source_val_fraction: float = 0.2, target_test_fraction: float = 0.3) -> DomainPair:
    """SVHN → MNIST from the files under ``root``: MNIST's grey digits repeated to RGB and resized to SVHN's 32×32
    (ours; ``data.channels=1 data.size=28`` puts SVHN on MNIST's shape instead). Parameters as :func:`digit_pair`."""
    return digit_pair("svhn", "mnist", name="svhn_mnist", **locals())


for _fn, (_s, _t) in ((mnist_usps, ("mnist", "usps")), (usps_mnist, ("usps", "mnist")),
                      (svhn_mnist, ("svhn", "mnist"))):
    _fn.check_files = _check_pair_files(_s, _t)  # run by config.check before any folder is written
