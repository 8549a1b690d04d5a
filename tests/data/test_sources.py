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


def test_a_missing_image_folder_names_the_folder(tmp_path):
    with pytest.raises(DataError, match="does not exist"):
        describe_source(DataSpec(source="folder", root=str(tmp_path / "mine")))


def test_an_unreadable_image_is_named(tmp_path):
    write_png_folder(tmp_path, "L")
    (tmp_path / "class3" / "broken.png").write_bytes(b"not a png")
    with pytest.raises(DataError, match=r"broken\.png cannot be read"):
        prepare_data(DataSpec(source="folder", root=str(tmp_path), val_size=100))
