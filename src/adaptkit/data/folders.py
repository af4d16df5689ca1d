"""Domains from image folders on local disk, read into memory (nothing downloads).

A labelled folder holds one sub-folder per class, as torchvision's ``ImageFolder`` reads it (class names sorted give
the labels 0..K-1); an unlabelled target folder may instead be flat (images directly inside). Every image is put on
one input shape — ``channels`` (1: grey, 3: RGB; PIL's own conversion) and ``size`` (resized) — so two domains
photographed or rendered differently meet the encoder alike.

Example:
    >>> pair = image_folder_pair("photos/source", "photos/target", size=32, channels=3)  # doctest: +SKIP
"""
from __future__ import annotations

from pathlib import Path
from typing import List, Optional, Sequence, Tuple, Union

import torch

from .._checks import check_choice, check_number
from .pair import UNLABELLED, DomainPair

Size = Union[int, Sequence[int]]


IMAGENET_MEAN = (0.485, 0.456, 0.406)  # the per-channel statistics torchvision's ImageNet weights expect
IMAGENET_STD = (0.229, 0.224, 0.225)  # (torchvision's model docs: transforms of the pretrained weights)


def image_transform(size: Size, channels: int = 3, mean: Optional[Sequence[float]] = None,
                    std: Optional[Sequence[float]] = None):
    """The transform to one input shape: PIL's conversion to grey (``"L"``, ITU-R 601-2 luma) or RGB (a grey image
    repeated), a resize to ``size`` (``(height, width)``, or one side for a square), then a float tensor in [0, 1]
    shaped ``(channels, height, width)``; with ``mean`` and ``std`` (one value per channel, e.g.
    :data:`IMAGENET_MEAN`/:data:`IMAGENET_STD` for ImageNet weights) each channel becomes ``(x − mean) / std``."""
    from torchvision import transforms

    check_choice("channels", "image_transform", channels, [1, 3])
    hw = (size, size) if isinstance(size, int) else tuple(size)
    if len(hw) != 2:
        raise ValueError(f"The 'size' parameter of image_transform must be one side or (height, width). Got {size!r}.")
    for side in hw:
        check_number("size", "image_transform", side, low=1, integer=True)
    mode = "L" if channels == 1 else "RGB"
    steps = [transforms.Lambda(lambda img: img.convert(mode)), transforms.Resize(tuple(int(s) for s in hw)),
             transforms.ToTensor()]
    if (mean is None) != (std is None):
        raise ValueError("image_transform needs both 'mean' and 'std' to normalise, or neither. Got "
                         f"mean={mean!r}, std={std!r}.")
    if mean is not None:
        for param, values in (("mean", mean), ("std", std)):
            if len(values) != channels:
                raise ValueError(f"The {param!r} parameter of image_transform must hold one value per channel "
                                 f"({channels}). Got {list(values)!r} instead.")
        for v in std:
            check_number("std", "image_transform", v, low=0, low_open=True)
        steps.append(transforms.Normalize([float(v) for v in mean], [float(v) for v in std]))
    return transforms.Compose(steps)


def _has_class_folders(root: Path) -> bool:
    return any(p.is_dir() and not p.name.startswith(".") for p in root.iterdir())


def read_image_folder(root, transform, classes: Optional[List[str]] = None,
                      what: str = "image folder") -> Tuple[torch.Tensor, torch.Tensor, List[str]]:
    """``(x, y, class names)`` of the images under ``root``: labels from class sub-folders, or all
    ``UNLABELLED`` (-1) for a flat folder (``class names`` then empty). With ``classes`` (the other domain's), a
    class folder's label is its index in ``classes``, and a class not among them is refused."""
    from torchvision.datasets import ImageFolder
    from torchvision.datasets.folder import IMG_EXTENSIONS, default_loader

    root = Path(root).expanduser()
    if not root.is_dir():
        raise ValueError(f"{what} {str(root)!r} is not a folder. Give a folder of class sub-folders (or, for an "
                         "unlabelled target, of images).")
    if _has_class_folders(root):
        try:
            ds = ImageFolder(str(root), transform=transform)
        except FileNotFoundError as e:  # a class folder without images
            raise ValueError(f"{what} {str(root)!r}: {str(e).splitlines()[0]}") from None
        names = list(ds.classes)
        if classes is not None:
            extra = [c for c in names if c not in classes]
            if extra:
                raise ValueError(f"{what} {str(root)!r} has class folder(s) {extra} that the source lacks; the "
                                 f"source's classes are {list(classes)}.")
            index = [classes.index(c) for c in names]
        else:
            index = list(range(len(names)))
        xs, ys = zip(*[(x, index[y]) for x, y in ds])
        return torch.stack(xs), torch.tensor(ys, dtype=torch.int64), names
    files = sorted(p for p in root.iterdir() if p.is_file() and p.suffix.lower() in IMG_EXTENSIONS)
    if not files:
        raise ValueError(f"{what} {str(root)!r} holds no class sub-folders and no images (accepted: "
                         f"{', '.join(IMG_EXTENSIONS)}).")
    x = torch.stack([transform(default_loader(str(p))) for p in files])
    return x, torch.full((len(files),), UNLABELLED, dtype=torch.int64), []


def image_folder_pair(source, target, *, size: Size = 32, channels: int = 3, mean: Optional[Sequence[float]] = None,
                      std: Optional[Sequence[float]] = None, name: Optional[str] = None,
                      **pair_options) -> DomainPair:
    """A :class:`DomainPair` from a labelled ``source`` folder (class sub-folders) and a ``target`` folder (class
    sub-folders, whose labels are kept for scoring only, or flat: unlabelled), every image put on
    ``(channels, size)`` (and normalised by ``mean``/``std``) by :func:`image_transform`. ``pair_options`` go to :class:`DomainPair` (splits, seed)."""
    transform = image_transform(size, channels, mean, std)
    src = Path(source).expanduser()
    if src.is_dir() and not _has_class_folders(src):
        raise ValueError(f"source image folder {str(src)!r} has no class sub-folders: the source must be labelled "
                         "(one sub-folder per class).")
    xs, ys, classes = read_image_folder(src, transform, what="source image folder")
    xt, yt, _ = read_image_folder(target, transform, classes=classes, what="target image folder")
    ty = None if bool((yt == UNLABELLED).all()) else yt.numpy()
    return DomainPair(xs, ys.numpy(), xt, ty, name=name or f"{src.name}->{Path(target).name}", **pair_options)


def image_folders(seed: int = 0, source: Optional[str] = None, target: Optional[str] = None, size: int = 32,
                  channels: int = 3, mean: Optional[List[float]] = None, std: Optional[List[float]] = None,
                  source_val_fraction: float = 0.2, target_test_fraction: float = 0.3) -> DomainPair:
    """``data=image_folders data.source=… data.target=…``: :func:`image_folder_pair` as a data choice of the
    commands (registered in :data:`~adaptkit.data.shifts.SHIFTS` by the shifts module), square images of ``size``
    pixels a side; ``seed`` seeds the splits (the run's seed unless set)."""
    if not source or not target:
        raise ValueError("data source 'image_folders' needs data.source (a folder of class sub-folders) and "
                         f"data.target (class sub-folders, or flat); got source={source!r}, target={target!r}.")
    seed = check_number("seed", "data source 'image_folders'", seed, low=0, integer=True)
    return image_folder_pair(source, target, size=size, channels=channels, mean=mean, std=std, name="image_folders",
                             source_val_fraction=source_val_fraction, target_test_fraction=target_test_fraction,
                             split_seed=seed)


def _check_folder_inputs(source: Optional[str] = None, target: Optional[str] = None, **_) -> None:
    if not source or not target:
        image_folders(source=source, target=target)  # the one message for an unset folder
    for what, folder in (("source", source), ("target", target)):
        if not Path(str(folder)).expanduser().is_dir():
            raise ValueError(f"{what} image folder {str(folder)!r} is not a folder (data.{what}).")


image_folders.check_files = _check_folder_inputs  # run by config.check before any folder is written
