"""Dataset sources: where images come from, as uint8-free float tensors in [0, 1].

Each source is declared with its shape, its classes and how to read it. torchvision sources
read an existing ``root`` and download only when the sweep says ``download = true``; a missing
dataset gets an error that says where we looked and how to fetch it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from kablate.errors import DataError
from kablate.spec.schema import DataSpec


@dataclass(frozen=True)
class ImageSet:
    """A split of a dataset held in memory: images (N, C, H, W) float32 in [0, 1]."""

    images: torch.Tensor
    labels: torch.Tensor  # int64, (N,)
    classes: tuple[str, ...]


@dataclass(frozen=True)
class Pools:
    """What a source provides: a training pool, and a test split if it has one."""

    train: ImageSet
    test: ImageSet | None


@dataclass(frozen=True)
class Source:
    name: str
    shape: tuple[int, int, int] | None  # None: read from the data (folder)
    n_classes: int | None
    read: Callable[[DataSpec], Pools]
    fetch_hint: str = ""


def _to_images(array: np.ndarray, layout: str) -> torch.Tensor:
    """uint8 arrays in NHW, NHWC or NCHW layout to float32 NCHW in [0, 1]."""
    t = torch.from_numpy(np.ascontiguousarray(array))
    if layout == "NHW":
        t = t.unsqueeze(1)
    elif layout == "NHWC":
        t = t.permute(0, 3, 1, 2)
    return t.contiguous().float().div_(255.0)


def read_digits(spec: DataSpec) -> Pools:
    """scikit-learn's bundled copy of the UCI handwritten digits: 1,797 8×8 images, offline."""
    from sklearn.datasets import load_digits

    bunch = load_digits()
    images = torch.from_numpy(bunch.images.astype(np.float32) / 16.0).unsqueeze(1)
    labels = torch.from_numpy(bunch.target.astype(np.int64))
    return Pools(ImageSet(images, labels, tuple(str(c) for c in range(10))), None)


def _torchvision(cls_name: str, layout: str, split_kw: str = "train") -> Callable:
    def read(spec: DataSpec) -> Pools:
        import torchvision.datasets as tvd

        cls = getattr(tvd, cls_name)
        sets = []
        for train in (True, False):
            kw = {"train": train} if split_kw == "train" else {"split": "train" if train else "test"}
            try:
                ds = cls(root=spec.root, download=spec.download, **kw)
            except (RuntimeError, FileNotFoundError) as exc:
                raise DataError(_missing(spec, cls_name, exc)) from None
            data = ds.data.numpy() if isinstance(ds.data, torch.Tensor) else np.asarray(ds.data)
            targets = getattr(ds, "targets", None)
            if targets is None:
                targets = ds.labels
            labels = torch.as_tensor(np.asarray(targets), dtype=torch.int64)
            classes = tuple(getattr(ds, "classes", None) or sorted({int(x) for x in labels}))
            sets.append(ImageSet(_to_images(data, layout), labels, tuple(map(str, classes))))
        return Pools(sets[0], sets[1])

    return read


def _missing(spec: DataSpec, cls_name: str, exc: Exception) -> str:
    return (
        f"dataset {spec.source} was not found under {Path(spec.root).resolve()} "
        f"(torchvision.datasets.{cls_name} said: {exc}). Put the files there, point "
        "`data.root` at them, or set `data.download = true` to fetch them (needs internet)."
    )


def read_folder(spec: DataSpec) -> Pools:
    """An image-folder tree (one sub-folder per class). ``root/train`` and ``root/test``
    are used as splits when both exist; otherwise the whole tree is the training pool."""
    root = Path(spec.root)
    if (root / "train").is_dir() and (root / "test").is_dir():
        return Pools(_read_image_folder(root / "train"), _read_image_folder(root / "test"))
    return Pools(_read_image_folder(root), None)


def _read_image_folder(root: Path) -> ImageSet:
    from torchvision.datasets import ImageFolder
    from torchvision.transforms.functional import pil_to_tensor

    if not root.is_dir():
        raise DataError(
            f"image folder {root.resolve()} does not exist; `data.root` must name a folder "
            "with one sub-folder of images per class"
        )
    try:
        ds = ImageFolder(str(root))
    except (FileNotFoundError, RuntimeError) as exc:
        raise DataError(f"image folder {root.resolve()} cannot be read: {exc}") from None
    tensors = [pil_to_tensor(ds.loader(path)) for path, _ in ds.samples]
    shapes = {tuple(t.shape) for t in tensors}
    if len(shapes) != 1:
        raise DataError(
            f"images under {root.resolve()} have {len(shapes)} different shapes "
            f"({sorted(shapes)[:3]}...); resize them to one size first"
        )
    images = torch.stack(tensors).float().div_(255.0)
    labels = torch.tensor([label for _, label in ds.samples], dtype=torch.int64)
    return ImageSet(images, labels, tuple(ds.classes))


SOURCES: dict[str, Source] = {
    "digits": Source("digits", (1, 8, 8), 10, read_digits),
    "mnist": Source("mnist", (1, 28, 28), 10, _torchvision("MNIST", "NHW")),
    "fashion-mnist": Source("fashion-mnist", (1, 28, 28), 10, _torchvision("FashionMNIST", "NHW")),
    "kmnist": Source("kmnist", (1, 28, 28), 10, _torchvision("KMNIST", "NHW")),
    "cifar10": Source("cifar10", (3, 32, 32), 10, _torchvision("CIFAR10", "NHWC")),
    "cifar100": Source("cifar100", (3, 32, 32), 100, _torchvision("CIFAR100", "NHWC")),
    "svhn": Source("svhn", (3, 32, 32), 10, _torchvision("SVHN", "NCHW", split_kw="split")),
    "folder": Source("folder", None, None, read_folder),
}


def describe_source(spec: DataSpec) -> tuple[tuple[int, int, int], int]:
    """Input shape (C, H, W) and class count, without loading the whole dataset if known."""
    source = SOURCES[spec.source]
    if source.shape is not None and source.n_classes is not None:
        return source.shape, source.n_classes
    pools = source.read(spec)
    c, h, w = pools.train.images.shape[1:]
    return (int(c), int(h), int(w)), len(pools.train.classes)
