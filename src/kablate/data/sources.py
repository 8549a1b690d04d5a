"""Dataset sources: where images come from, read once into memory.

Each source is declared with its shape, its class count, how to read it and where its files are
expected. torchvision sources read an existing ``root`` and download only when the sweep says
``download = true``; a missing dataset gets an error that says where we looked and how to fetch
it. Pools keep the source's own uint8 pixels, so a 50,000-image training pool costs its bytes,
not four times that; `kablate.data.prepare` converts only the chosen subset to float.
"""

from __future__ import annotations

import functools
import gzip
import importlib.util
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from kablate.data.integrity import check_idx_pair, checksum_mismatch
from kablate.errors import DataError
from kablate.spec.schema import DataSpec

GRAYSCALE_MODES = ("1", "L", "LA", "I", "I;16", "F")  # PIL modes read as one channel


@dataclass(frozen=True)
class ImageSet:
    """A split of a dataset held in memory, images (N, C, H, W).

    ``images`` is uint8 (0..255) as the source stores it, or float32 already in [0, 1].
    """

    images: torch.Tensor
    labels: torch.Tensor  # int64, (N,)
    classes: tuple[str, ...]

    def as_float(self, idx: torch.Tensor) -> torch.Tensor:
        """The images at ``idx`` as float32 in [0, 1]."""
        picked = self.images[idx]
        if picked.dtype == torch.uint8:
            return picked.float().div_(255.0)
        return picked.float()


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
    expects: tuple[str, ...] = ()  # files or folders under `root` that the reader needs
    # (training labels, test labels or None) without decoding any image, for sources where
    # that is cheap, so that `kablate plan` can check the splits; None: checked when read
    labels: Callable[[DataSpec], tuple[np.ndarray, np.ndarray | None]] | None = None


def _to_images(array: np.ndarray, layout: str) -> torch.Tensor:
    """uint8 arrays in NHW, NHWC or NCHW layout to uint8 NCHW."""
    t = torch.from_numpy(np.ascontiguousarray(array))
    if layout == "NHW":
        t = t.unsqueeze(1)
    elif layout == "NHWC":
        t = t.permute(0, 3, 1, 2)
    return t.contiguous()


@functools.cache
def digits_table() -> np.ndarray:
    """scikit-learn's bundled digits file, (1797, 65): 64 pixel counts and the label per row.

    Read as `sklearn.datasets.load_digits` reads it (``np.loadtxt`` of the gzipped CSV in
    ``sklearn/datasets/data``), but without importing scikit-learn, which costs every process
    that prepares the data about 1.7 CPU-seconds (the runner and each worker). When the file is
    not where this scikit-learn keeps it, `load_digits` itself is used. Cached: the runner
    reads the labels for its split check and then the images; callers must not change it.
    """
    spec = importlib.util.find_spec("sklearn")  # finds the package without importing it
    roots = spec.submodule_search_locations if spec is not None else None
    path = Path(roots[0]) / "datasets" / "data" / "digits.csv.gz" if roots else None
    if path is None or not path.is_file():
        from sklearn.datasets import load_digits

        bunch = load_digits()
        return np.column_stack([bunch.data, bunch.target]).astype(np.float64)
    with gzip.open(path, mode="rt", encoding="utf-8") as text:
        return np.loadtxt(text, delimiter=",")


def digits_labels(spec: DataSpec) -> tuple[np.ndarray, None]:
    return digits_table()[:, -1].astype(np.int64), None


def read_digits(spec: DataSpec) -> Pools:
    """scikit-learn's bundled copy of the UCI handwritten digits: 1,797 8×8 images, offline.

    Pixels are counts 0..16 (of 4×4 blocks of the original 32×32 bitmaps); they are scaled to
    [0, 1] as float32.
    """
    table = digits_table()
    images = torch.from_numpy(table[:, :-1].reshape(-1, 1, 8, 8).astype(np.float32) / 16.0)
    labels = torch.from_numpy(table[:, -1].astype(np.int64))
    return Pools(ImageSet(images, labels, tuple(str(c) for c in range(10))), None)


def _torchvision(name: str, cls_name: str, layout: str) -> Callable[[DataSpec], Pools]:
    """A reader for a torchvision dataset class with a train and a test split."""

    def read(spec: DataSpec) -> Pools:
        import torchvision.datasets as tvd

        cls = getattr(tvd, cls_name)
        expected = [Path(spec.root) / path for path in SOURCES[name].expects]
        if layout == "NHW" and all(path.is_file() for path in expected):
            check_idx_pair(*expected[:2])  # torchvision's errors would not name the file
            check_idx_pair(*expected[2:])
        sets = []
        for train in (True, False):
            split = {"split": "train" if train else "test"} if name == "svhn" else {"train": train}
            try:
                ds = cls(root=spec.root, download=spec.download, **split)
            except (RuntimeError, OSError, ValueError, AssertionError) as exc:
                mismatch = checksum_mismatch(cls, Path(spec.root))
                raise DataError(mismatch or missing_message(spec, cls_name, exc)) from None
            data = ds.data.numpy() if isinstance(ds.data, torch.Tensor) else np.asarray(ds.data)
            targets = getattr(ds, "targets", None)
            if targets is None:
                targets = ds.labels  # SVHN
            labels = torch.as_tensor(np.asarray(targets), dtype=torch.int64)
            if len(labels) != len(data):
                where = Path(spec.root).resolve()
                raise DataError(
                    f"dataset {name} under {where} has {len(data)} images but {len(labels)} "
                    f"labels in its {'train' if train else 'test'} split; the files are damaged "
                    "or from different copies"
                )
            classes = getattr(ds, "classes", None) or sorted({int(x) for x in labels})
            sets.append(ImageSet(_to_images(data, layout), labels, tuple(map(str, classes))))
        return Pools(sets[0], sets[1])

    return read


def missing_message(spec: DataSpec, cls_name: str, exc: Exception) -> str:
    """Where we looked, what torchvision said, and the three ways to fix it."""
    root = Path(spec.root).resolve()
    expected = ", ".join(str(root / p) for p in SOURCES[spec.source].expects)
    said = str(exc) or type(exc).__name__  # torchvision's asserts carry no message
    fetch = (
        "`data.download = true` was set, but the download failed (it needs internet): fetch "
        "the files on a machine that has internet and put them there, or point `data.root` "
        "at the folder that holds them"
        if spec.download
        else "Put the files there, point `data.root` at the folder that holds them, or set "
        "`data.download = true` to let torchvision fetch them (needs internet)"
    )
    return (
        f"dataset {spec.source} was not found or could not be read under {root}: expected "
        f"{expected} (torchvision.datasets.{cls_name} said: {said}). {fetch}."
    )


def read_folder(spec: DataSpec) -> Pools:
    """An image-folder tree (one sub-folder per class), read with torchvision's ImageFolder.

    ``root/train`` and ``root/test`` are used as splits when both exist; otherwise the whole
    tree is the training pool (a lone ``train/`` or ``test/`` of class folders is refused).
    Images are read as one channel when every image is grayscale, else as RGB.
    """
    train_root, test_root = _folder_splits(Path(spec.root))
    if test_root is not None:
        train, test = _read_image_folder(train_root), _read_image_folder(test_root)
        if train.classes != test.classes:
            raise DataError(
                f"{train_root.resolve()} and {test_root.resolve()} have different "
                f"class folders ({list(train.classes)} against {list(test.classes)}); they "
                "must have the same ones"
            )
        return Pools(train, test)
    return Pools(_read_image_folder(train_root), None)


FOLDER_LAYOUT = (
    "`data.root` must name a folder with one sub-folder of images per class (or `train/` and "
    "`test/` folders of them)"
)


def _folder_splits(root: Path) -> tuple[Path, Path | None]:
    """(training tree, test tree or None) of an image folder.

    A lone ``train/`` or ``test/`` that holds only folders is a split, not a class; read as a
    class it would silently turn a `train/` + `val/` tree into a two-class problem.
    """
    train, test = root / "train", root / "test"
    if train.is_dir() and test.is_dir():
        return train, test
    for lone in (train, test):
        if lone.is_dir() and all(child.is_dir() for child in lone.iterdir()):
            raise DataError(
                f"image folder {root.resolve()} has a `{lone.name}/` folder of class folders "
                "but no matching `train/` and `test/` pair; " + FOLDER_LAYOUT
            )
    return root, None


def _list_image_folder(root: Path):
    from torchvision.datasets import ImageFolder

    if not root.is_dir():
        raise DataError(f"image folder {root.resolve()} does not exist; " + FOLDER_LAYOUT)
    try:
        return ImageFolder(str(root))  # lists the files; we decode them ourselves
    except (FileNotFoundError, RuntimeError) as exc:
        raise DataError(
            f"image folder {root.resolve()} cannot be read: {str(exc).rstrip('.')}; "
            + FOLDER_LAYOUT
        ) from None


def _scan_headers(root: Path, paths: list[str]) -> tuple[int, int, int]:
    """(channels, height, width) of a folder's images, from their headers only."""
    from PIL import Image

    modes, sizes = set(), set()
    for path in paths:
        try:
            with Image.open(path) as img:
                modes.add(img.mode)
                sizes.add(img.size)
                img.verify()  # reads the file without decoding it: finds a truncated PNG
        except (OSError, SyntaxError, ValueError) as exc:  # UnidentifiedImageError: an OSError
            raise DataError(f"image {Path(path).resolve()} cannot be read: {exc}") from None
    if len(sizes) != 1:
        raise DataError(
            f"images under {root.resolve()} have {len(sizes)} different sizes "
            f"({sorted(sizes)[:3]}...); resize them to one size first"
        )
    ((width, height),) = sizes
    return (1 if modes <= set(GRAYSCALE_MODES) else 3), height, width


def _read_image_folder(root: Path) -> ImageSet:
    from PIL import Image
    from torchvision.transforms.functional import pil_to_tensor

    ds = _list_image_folder(root)
    paths = [path for path, _ in ds.samples]
    mode = "L" if _scan_headers(root, paths)[0] == 1 else "RGB"
    tensors = []
    for path in paths:
        try:
            with Image.open(path) as img:
                tensors.append(pil_to_tensor(img.convert(mode)))
        except (OSError, SyntaxError, ValueError) as exc:  # e.g. a truncated JPEG
            raise DataError(f"image {Path(path).resolve()} cannot be read: {exc}") from None
    labels = torch.tensor([label for _, label in ds.samples], dtype=torch.int64)
    return ImageSet(torch.stack(tensors), labels, tuple(ds.classes))


def folder_labels(spec: DataSpec) -> tuple[np.ndarray, np.ndarray | None]:
    """The labels of an image folder's training tree (and test tree), from the listing."""
    train_root, test_root = _folder_splits(Path(spec.root))
    train = _list_image_folder(train_root).targets
    test = _list_image_folder(test_root).targets if test_root is not None else None
    return np.asarray(train, dtype=np.int64), None if test is None else np.asarray(test)


def _folder_shape(root: Path) -> tuple[tuple[int, int, int], int]:
    """Shape and class count of an image folder, from the file headers only."""
    root = _folder_splits(root)[0]
    ds = _list_image_folder(root)
    return _scan_headers(root, [path for path, _ in ds.samples]), len(ds.classes)


def _torchvision_source(
    name: str,
    cls_name: str,
    layout: str,
    shape: tuple[int, int, int],
    n_classes: int,
    expects: tuple[str, ...],
) -> Source:
    return Source(name, shape, n_classes, _torchvision(name, cls_name, layout), expects)


def _idx_files(folder: str) -> tuple[str, ...]:
    """The four uncompressed IDX files torchvision's MNIST-style classes look for."""
    names = ("train-images-idx3", "train-labels-idx1", "t10k-images-idx3", "t10k-labels-idx1")
    return tuple(f"{folder}/raw/{n}-ubyte" for n in names)


SOURCES: dict[str, Source] = {
    "digits": Source("digits", (1, 8, 8), 10, read_digits, labels=digits_labels),
    "mnist": _torchvision_source("mnist", "MNIST", "NHW", (1, 28, 28), 10, _idx_files("MNIST")),
    "fashion-mnist": _torchvision_source(
        "fashion-mnist", "FashionMNIST", "NHW", (1, 28, 28), 10, _idx_files("FashionMNIST")
    ),
    "kmnist": _torchvision_source("kmnist", "KMNIST", "NHW", (1, 28, 28), 10, _idx_files("KMNIST")),
    "cifar10": _torchvision_source(
        "cifar10",
        "CIFAR10",
        "NHWC",
        (3, 32, 32),
        10,
        ("cifar-10-batches-py/data_batch_1", "cifar-10-batches-py/test_batch"),
    ),
    "cifar100": _torchvision_source(
        "cifar100",
        "CIFAR100",
        "NHWC",
        (3, 32, 32),
        100,
        ("cifar-100-python/train", "cifar-100-python/test"),
    ),
    "svhn": _torchvision_source(
        "svhn", "SVHN", "NCHW", (3, 32, 32), 10, ("train_32x32.mat", "test_32x32.mat")
    ),
    "folder": Source("folder", None, None, read_folder, labels=folder_labels),
}


def describe_source(spec: DataSpec) -> tuple[tuple[int, int, int], int]:
    """Input shape (C, H, W) and class count, without decoding the images.

    Raises:
        DataError: the data cannot be read, or has fewer than two classes.
    """
    source = SOURCES[spec.source]
    if source.shape is not None and source.n_classes is not None:
        return source.shape, source.n_classes
    shape, n_classes = _folder_shape(Path(spec.root))
    require_classes(n_classes, f"image folder {Path(spec.root).resolve()}")
    return shape, n_classes


def require_classes(n_classes: int, what: str) -> None:
    """Refuse data with fewer than two classes: every model would score 100% on it."""
    if n_classes < 2:
        raise DataError(
            f"{what} has {n_classes} class{'es' if n_classes != 1 else ''}, but a classifier "
            "needs at least two"
        )
