"""Data sources read real files that the tests write, through torchvision's own readers."""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from PIL import Image
from sklearn.datasets import load_digits

from kablate.data import describe_source, prepare_data
from kablate.data.sources import SOURCES
from kablate.errors import DataError, UsageError
from kablate.spec.schema import DataSpec


def digits_uint8(size: int) -> tuple[np.ndarray, np.ndarray]:
    """scikit-learn's digits as uint8 images (N, size, size), bilinear-upsampled from 8x8."""
    bunch = load_digits()
    small = torch.from_numpy(bunch.images.astype(np.float32) / 16.0)[:, None]
    if size != 8:
        small = F.interpolate(small, size=(size, size), mode="bilinear", align_corners=False)
    pixels = (small.clamp(0, 1) * 255).round().to(torch.uint8)[:, 0].numpy()
    return pixels, bunch.target.astype(np.uint8)


def write_idx(path: Path, array: np.ndarray) -> None:
    """Write a uint8 array in the IDX layout published with the MNIST database (LeCun, Cortes
    & Burges): a big-endian magic number 0x0000 08 <n_dims>, one big-endian int32 per
    dimension, then the bytes in row-major order."""
    header = struct.pack(">BBBB", 0, 0, 0x08, array.ndim)
    header += struct.pack(f">{array.ndim}I", *array.shape)
    path.write_bytes(header + np.ascontiguousarray(array, dtype=np.uint8).tobytes())


def write_mnist_layout(root: Path, folder: str, size: int = 28) -> tuple[np.ndarray, np.ndarray]:
    """Digits as MNIST files: the first 1,300 as train, the rest as the test split (t10k)."""
    pixels, labels = digits_uint8(size)
    raw = root / folder / "raw"
    raw.mkdir(parents=True)
    write_idx(raw / "train-images-idx3-ubyte", pixels[:1300])
    write_idx(raw / "train-labels-idx1-ubyte", labels[:1300])
    write_idx(raw / "t10k-images-idx3-ubyte", pixels[1300:])
    write_idx(raw / "t10k-labels-idx1-ubyte", labels[1300:])
    return pixels, labels


def unnormalise(images: torch.Tensor, data) -> np.ndarray:
    mean = torch.tensor(data.mean)[None, :, None, None]
    std = torch.tensor(data.std)[None, :, None, None]
    return (images * std + mean).mul(255).round().to(torch.uint8).numpy()


MNIST_LAYOUT = [("mnist", "MNIST"), ("fashion-mnist", "FashionMNIST"), ("kmnist", "KMNIST")]


@pytest.mark.parametrize(("source", "folder"), MNIST_LAYOUT)
def test_idx_files_are_read_through_torchvision(tmp_path, source, folder):
    pixels, labels = write_mnist_layout(tmp_path, folder)
    spec = DataSpec(source=source, root=str(tmp_path), val_size=100, train_size=500)
    data = prepare_data(spec)
    # Shape and classes as declared for the source, and as describe_source says without reading.
    assert data.in_shape == (1, 28, 28) == describe_source(spec)[0]
    assert data.n_classes == 10
    assert data.test_pool == "the source's test split"
    assert len(data.test.labels) == len(labels) - 1300
    # The pixels and labels we wrote come back, image for image.
    train_idx = data.train.indices
    assert data.train.labels.tolist() == labels[train_idx].tolist()
    np.testing.assert_array_equal(unnormalise(data.train.images, data)[:, 0], pixels[train_idx])
    test_idx = data.test.indices
    assert data.test.labels.tolist() == labels[1300 + test_idx].tolist()
    np.testing.assert_array_equal(
        unnormalise(data.test.images, data)[:, 0], pixels[1300 + test_idx]
    )


def test_idx_files_of_the_wrong_size_are_refused(tmp_path):
    write_mnist_layout(tmp_path, "MNIST", size=8)
    with pytest.raises(DataError, match=r"shape \(1, 8, 8\).*\(1, 28, 28\)"):
        prepare_data(DataSpec(source="mnist", root=str(tmp_path), val_size=50))


def write_png_folder(root: Path, mode: str, split: str = "") -> tuple[np.ndarray, np.ndarray]:
    """The first 600 digits as PNGs in an image-folder tree: root/[split/]<class>/<i>.png."""
    pixels, labels = digits_uint8(8)
    pixels, labels = pixels[:600], labels[:600]
    for i, (img, label) in enumerate(zip(pixels, labels, strict=True)):
        folder = root / split / f"class{label}"
        folder.mkdir(parents=True, exist_ok=True)
        Image.fromarray(img, mode="L").convert(mode).save(folder / f"{i:04d}.png")
    return pixels, labels


def test_grayscale_pngs_are_read_through_image_folder(tmp_path):
    from torchvision.datasets import ImageFolder

    pixels, labels = write_png_folder(tmp_path, "L")
    spec = DataSpec(source="folder", root=str(tmp_path), val_size=100)
    data = prepare_data(spec)
    assert data.in_shape == (1, 8, 8)  # every image grayscale: one channel
    assert describe_source(spec) == ((1, 8, 8), 10)
    assert data.test_pool.startswith("held out")
    # Class order and sample order are ImageFolder's (torchvision): sorted folder names, then
    # sorted file names; our indices point into that list.
    reference = ImageFolder(str(tmp_path))
    assert data.classes == tuple(reference.classes) == tuple(f"class{c}" for c in range(10))
    order = [int(Path(path).stem) for path, _ in reference.samples]
    picked = np.array(order)[data.train.indices]
    np.testing.assert_array_equal(unnormalise(data.train.images, data)[:, 0], pixels[picked])
    assert data.train.labels.tolist() == labels[picked].tolist()


def test_rgb_pngs_with_train_and_test_folders_use_the_test_folder(tmp_path):
    write_png_folder(tmp_path, "RGB", "train")
    write_png_folder(tmp_path, "RGB", "test")
    data = prepare_data(DataSpec(source="folder", root=str(tmp_path), val_size=100))
    assert data.in_shape == (3, 8, 8)
    assert data.test_pool == "the source's test split"
    assert len(data.test.labels) == 600


def test_train_and_test_folders_must_have_the_same_classes(tmp_path):
    write_png_folder(tmp_path, "L", "train")
    write_png_folder(tmp_path, "L", "test")
    for png in (tmp_path / "test" / "class9").iterdir():
        png.unlink()
    (tmp_path / "test" / "class9").rmdir()
    with pytest.raises(DataError, match="different class folders"):
        prepare_data(DataSpec(source="folder", root=str(tmp_path), val_size=100))


def test_unreadable_idx_files_get_torchvision_words_or_the_error_type(tmp_path):
    raw = tmp_path / "MNIST" / "raw"
    raw.mkdir(parents=True)
    for name in SOURCES["mnist"].expects:
        (tmp_path / name).write_bytes(bytes(100))  # magic number 0: not an IDX file
    with pytest.raises(DataError, match=r"MNIST said: \S.*\)\. Put the files there"):
        prepare_data(DataSpec(source="mnist", root=str(tmp_path)))


def colour_digits(n: int) -> tuple[np.ndarray, np.ndarray]:
    """n digits as 32x32 RGB uint8 (N, 32, 32, 3), each channel scaled differently."""
    pixels, labels = digits_uint8(32)
    rgb = np.stack([pixels[:n], pixels[:n] // 2, 255 - pixels[:n]], axis=-1)
    return np.ascontiguousarray(rgb), labels[:n].astype(np.int64)


def write_cifar(root: Path, hundred: bool) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """The first 400 digits in the python pickle layout of CIFAR-10/100, as the dataset's page
    describes it (from memory; torchvision's reader accepting the files is the check): dicts
    whose ``data`` is (N, 3072) uint8 rows, the 1,024 red values, then green, then blue, each
    row-major, with ``labels`` (CIFAR-10) or ``fine_labels`` (CIFAR-100), and a meta file of
    class names. Train gets the first 300 images, test the last 100."""
    import pickle

    rgb, labels = colour_digits(400)
    rows = rgb.transpose(0, 3, 1, 2).reshape(len(rgb), 3072)
    names = [f"digit{c}" for c in range(100 if hundred else 10)]
    folder = root / ("cifar-100-python" if hundred else "cifar-10-batches-py")
    folder.mkdir(parents=True)
    key = "fine_labels" if hundred else "labels"
    parts = {"train": (0, 300), "test": (300, 400)}
    if not hundred:
        parts = {f"data_batch_{i}": (60 * (i - 1), 60 * i) for i in range(1, 6)}
        parts["test_batch"] = (300, 400)
    for name, (lo, hi) in parts.items():
        batch = {"data": rows[lo:hi], key: labels[lo:hi].tolist()}
        (folder / name).write_bytes(pickle.dumps(batch))
    meta = {"fine_label_names": names} if hundred else {"label_names": names}
    (folder / ("meta" if hundred else "batches.meta")).write_bytes(pickle.dumps(meta))
    return rgb, labels, names


def write_svhn(root: Path) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """The first 400 digits as SVHN's cropped-digit .mat files, as the dataset's page describes
    them (from memory; torchvision's reader accepting the files is the check): ``X`` of shape
    (32, 32, 3, N) and ``y`` of shape (N, 1), with the digit 0 labelled 10."""
    from scipy.io import savemat

    rgb, labels = colour_digits(400)
    for name, (lo, hi) in {"train_32x32.mat": (0, 300), "test_32x32.mat": (300, 400)}.items():
        y = np.where(labels[lo:hi] == 0, 10, labels[lo:hi]).astype(np.uint8)[:, None]
        savemat(root / name, {"X": rgb[lo:hi].transpose(1, 2, 3, 0), "y": y})
    return rgb, labels, [str(c) for c in range(10)]


@pytest.mark.parametrize("source", ["cifar10", "cifar100", "svhn"])
def test_colour_files_are_read_through_torchvision_channel_for_channel(
    tmp_path, monkeypatch, source
):
    import torchvision.datasets.cifar
    import torchvision.datasets.svhn

    # Our files are not the published ones, so their MD5 sums differ; accept them.
    for module in (torchvision.datasets.cifar, torchvision.datasets.svhn):
        monkeypatch.setattr(module, "check_integrity", lambda *args, **kwargs: True)
    if source == "svhn":
        rgb, labels, classes = write_svhn(tmp_path)
    else:
        rgb, labels, classes = write_cifar(tmp_path, hundred=source == "cifar100")
    spec = DataSpec(source=source, root=str(tmp_path), val_size=50, train_size=200)
    data = prepare_data(spec)
    assert data.in_shape == (3, 32, 32) == describe_source(spec)[0]
    assert data.classes == tuple(classes) and data.test_pool == "the source's test split"
    train_idx, test_idx = data.train.indices, data.test.indices
    assert data.train.labels.tolist() == labels[train_idx].tolist()
    assert data.test.labels.tolist() == labels[300 + test_idx].tolist()
    # Channel for channel: red, green and blue land in channels 0, 1 and 2 of NCHW.
    expected = rgb.transpose(0, 3, 1, 2)
    np.testing.assert_array_equal(unnormalise(data.train.images, data), expected[train_idx])
    np.testing.assert_array_equal(unnormalise(data.test.images, data), expected[300 + test_idx])


TORCHVISION = ["mnist", "fashion-mnist", "kmnist", "cifar10", "cifar100", "svhn"]


@pytest.mark.parametrize("source", TORCHVISION)
def test_a_missing_dataset_says_where_it_looked_and_how_to_fetch_it(tmp_path, source):
    spec = DataSpec(source=source, root=str(tmp_path / "nowhere"))
    with pytest.raises(DataError) as info:
        prepare_data(spec)
    message = str(info.value)
    assert isinstance(info.value, UsageError)  # the CLI prints it and exits with code 2
    assert str((tmp_path / "nowhere").resolve()) in message
    assert str((tmp_path / "nowhere").resolve() / SOURCES[source].expects[0]) in message
    assert "`data.download = true`" in message and "`data.root`" in message
    assert not (tmp_path / "nowhere").exists()  # nothing was downloaded or created


def test_a_failed_download_says_so_and_names_the_files(tmp_path, monkeypatch):
    from urllib.error import URLError

    import torchvision.datasets

    def offline(self):
        raise URLError("no network")

    monkeypatch.setattr(torchvision.datasets.MNIST, "download", offline)
    spec = DataSpec(source="mnist", root=str(tmp_path), download=True)
    with pytest.raises(DataError) as info:
        prepare_data(spec)
    message = str(info.value)
    assert "download failed" in message and "no network" in message
    assert str(tmp_path.resolve() / SOURCES["mnist"].expects[0]) in message
    assert "set `data.download = true`" not in message  # it was set


def test_a_missing_image_folder_names_the_folder(tmp_path):
    with pytest.raises(DataError, match="does not exist"):
        describe_source(DataSpec(source="folder", root=str(tmp_path / "mine")))
    with pytest.raises(DataError, match=r"cannot be read.*one sub-folder of images per class"):
        describe_source(DataSpec(source="folder", root=str(tmp_path)))  # empty


def test_a_lone_train_split_is_not_read_as_a_class(tmp_path):
    write_png_folder(tmp_path, "L", "train")
    write_png_folder(tmp_path, "L", "val")
    with pytest.raises(DataError, match=r"`train/` folder of class folders but no matching"):
        describe_source(DataSpec(source="folder", root=str(tmp_path)))
    with pytest.raises(DataError, match=r"`train/` folder of class folders but no matching"):
        prepare_data(DataSpec(source="folder", root=str(tmp_path), val_size=100))


def test_a_class_that_is_named_train_is_still_a_class(tmp_path):
    pixels, _ = digits_uint8(8)
    for name, first in (("train", 0), ("boat", 40)):
        (tmp_path / name).mkdir()
        for i in range(first, first + 40):
            Image.fromarray(pixels[i], mode="L").save(tmp_path / name / f"{i:03d}.png")
    data = prepare_data(DataSpec(source="folder", root=str(tmp_path), val_size=20))
    assert data.classes == ("boat", "train")  # ImageFolder's order: sorted names


def test_an_unreadable_image_is_named(tmp_path):
    write_png_folder(tmp_path, "L")
    (tmp_path / "class3" / "broken.png").write_bytes(b"not a png")
    with pytest.raises(DataError, match=r"broken\.png cannot be read"):
        prepare_data(DataSpec(source="folder", root=str(tmp_path), val_size=100))
