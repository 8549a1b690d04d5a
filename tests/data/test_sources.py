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


def test_a_file_that_is_not_idx_is_named(tmp_path):
    raw = tmp_path / "MNIST" / "raw"
    raw.mkdir(parents=True)
    for name in SOURCES["mnist"].expects:
        (tmp_path / name).write_bytes(b"\x1f\x8b" + bytes(98))  # a gzip header, not unpacked
    first = tmp_path.resolve() / SOURCES["mnist"].expects[0]
    with pytest.raises(DataError, match=rf"^{first} is not an IDX file"):
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


def rewrite_idx(path: Path, type_byte: int | None = None, keep: int | None = None) -> None:
    """Change an IDX file's type byte (the third byte of its magic number), or keep only its
    first ``keep`` items (header fixed up), or cut its last 10 bytes (header left as is)."""
    data = bytearray(path.read_bytes())
    n_dims = data[3]
    if type_byte is not None:
        data[2] = type_byte
    elif keep is not None:
        dims = struct.unpack(f">{n_dims}I", data[4 : 4 + 4 * n_dims])
        item = int(np.prod(dims[1:])) if n_dims > 1 else 1
        data[4:8] = struct.pack(">I", keep)
        data = data[: 4 + 4 * n_dims + keep * item]
    else:
        data = data[:-10]
    path.write_bytes(bytes(data))


@pytest.mark.parametrize(("type_byte", "shown"), [(0x0A, "0x0A"), (0x09, "0x09"), (0x0D, "0x0D")])
def test_an_idx_file_of_another_type_is_named(tmp_path, type_byte, shown):
    # 0x0A is no IDX type at all, 0x09 is signed bytes, 0x0D floats (the MNIST page's table)
    write_mnist_layout(tmp_path, "MNIST")
    path = tmp_path / "MNIST" / "raw" / "t10k-labels-idx1-ubyte"
    rewrite_idx(path, type_byte=type_byte)
    with pytest.raises(DataError) as info:
        prepare_data(DataSpec(source="mnist", root=str(tmp_path), val_size=100))
    message = str(info.value)
    assert str(path.resolve()) in message and f"type byte {shown}" in message
    assert "not found" not in message


@pytest.mark.parametrize("n_labels", [1000, 1299])
def test_labels_and_images_of_different_counts_are_refused_naming_both(tmp_path, n_labels):
    write_mnist_layout(tmp_path, "FashionMNIST")
    raw = tmp_path / "FashionMNIST" / "raw"
    rewrite_idx(raw / "train-labels-idx1-ubyte", keep=n_labels)
    with pytest.raises(DataError) as info:
        prepare_data(DataSpec(source="fashion-mnist", root=str(tmp_path), val_size=100))
    message = str(info.value)
    assert f"{raw.resolve() / 'train-images-idx3-ubyte'} holds 1,300 images" in message
    assert f"{raw.resolve() / 'train-labels-idx1-ubyte'} holds {n_labels:,} labels" in message


def test_more_labels_than_images_are_refused_too(tmp_path):
    write_mnist_layout(tmp_path, "KMNIST")
    raw = tmp_path / "KMNIST" / "raw"
    rewrite_idx(raw / "t10k-images-idx3-ubyte", keep=400)  # 497 labels stay
    with pytest.raises(DataError, match=r"holds 400 images but .*t10k-labels.* holds 497 labels"):
        prepare_data(DataSpec(source="kmnist", root=str(tmp_path), val_size=100))


def test_a_truncated_idx_file_is_named(tmp_path):
    write_mnist_layout(tmp_path, "MNIST")
    path = tmp_path / "MNIST" / "raw" / "train-images-idx3-ubyte"
    rewrite_idx(path)
    with pytest.raises(DataError, match=r"idx3-ubyte is 1,019,206 bytes, but its header"):
        prepare_data(DataSpec(source="mnist", root=str(tmp_path), val_size=100))


def cut_in_half(path: Path) -> None:
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


def test_a_truncated_png_is_named_by_plan(tmp_path):
    write_png_folder(tmp_path, "L")
    bad = sorted((tmp_path / "class4").iterdir())[3]
    cut_in_half(bad)
    spec = DataSpec(source="folder", root=str(tmp_path), val_size=100)
    with pytest.raises(DataError, match=rf"^image {bad.resolve()} cannot be read: .*runcated"):
        describe_source(spec)  # what `kablate plan` reads: the headers and the files' bytes
    with pytest.raises(DataError, match=rf"^image {bad.resolve()} cannot be read"):
        prepare_data(spec)


def test_a_truncated_jpeg_is_named_when_the_images_are_read(tmp_path):
    noise = np.random.default_rng(0).integers(0, 256, (20, 64, 64), dtype=np.uint8)
    for name in ("a", "b"):
        (tmp_path / name).mkdir()
        for i in range(10):
            Image.fromarray(noise[i]).save(tmp_path / name / f"{i}.jpg", quality=95)
    bad = tmp_path / "b" / "7.jpg"
    bad.write_bytes(bad.read_bytes()[:-200])  # the header and most of the scan survive
    spec = DataSpec(source="folder", root=str(tmp_path), val_size=4)
    assert describe_source(spec) == ((1, 64, 64), 2)  # PIL's verify() does not decode a JPEG
    with pytest.raises(DataError, match=rf"^image {bad.resolve()} cannot be read: .*truncated"):
        prepare_data(spec)


def test_a_one_class_folder_is_refused_at_plan_time(tmp_path):
    pixels, _ = digits_uint8(8)
    (tmp_path / "only").mkdir()
    for i in range(20):
        Image.fromarray(pixels[i]).save(tmp_path / "only" / f"{i}.png")
    with pytest.raises(DataError, match=r"has 1 class, but a classifier needs at least two"):
        describe_source(DataSpec(source="folder", root=str(tmp_path), val_size=4))


def test_a_one_class_idx_copy_is_refused_when_read(tmp_path):
    write_mnist_layout(tmp_path, "MNIST")
    labels = tmp_path / "MNIST" / "raw" / "train-labels-idx1-ubyte"
    data = bytearray(labels.read_bytes())
    data[8:] = bytes(len(data) - 8)  # every training label 0
    labels.write_bytes(bytes(data))
    with pytest.raises(DataError, match=r"training pool of dataset mnist has 1 class"):
        prepare_data(DataSpec(source="mnist", root=str(tmp_path), val_size=100))


def test_a_cifar_copy_with_a_wrong_checksum_is_a_checksum_mismatch(tmp_path):
    write_cifar(tmp_path, hundred=False)  # our files are not the published ones
    with pytest.raises(DataError) as info:
        prepare_data(DataSpec(source="cifar10", root=str(tmp_path), val_size=50))
    message = str(info.value)
    batch = tmp_path.resolve() / "cifar-10-batches-py" / "data_batch_1"
    assert message.startswith("checksum mismatch in dataset CIFAR10: ")
    assert f"{batch} has MD5 " in message and "expected c99cafc152244af753f735de768cd75f" in message
    assert "not found" not in message


def test_a_missing_cifar_file_is_still_missing_not_a_mismatch(tmp_path, monkeypatch):
    import torchvision.datasets.cifar

    import kablate.data.integrity as integrity

    write_cifar(tmp_path, hundred=False)
    good = torchvision.datasets.cifar.CIFAR10.train_list[0][1]  # pretend data_batch_1 is fine
    monkeypatch.setattr(integrity, "file_md5", lambda path: good)
    for path in (tmp_path / "cifar-10-batches-py").iterdir():
        if path.name != "data_batch_1":
            path.unlink()
    with pytest.raises(DataError, match="was not found or could not be read"):
        prepare_data(DataSpec(source="cifar10", root=str(tmp_path), val_size=50))


def test_an_svhn_copy_with_a_wrong_checksum_names_the_file(tmp_path):
    write_svhn(tmp_path)
    with pytest.raises(
        DataError, match=rf"checksum mismatch in dataset SVHN: {tmp_path.resolve()}"
    ):
        prepare_data(DataSpec(source="svhn", root=str(tmp_path), val_size=50))


@pytest.mark.parametrize("source", ["digits", "folder"])
def test_a_split_that_leaves_no_training_image_is_refused_by_plan(tmp_path, source):
    from kablate.data.prepare import check_splits

    if source == "folder":
        write_png_folder(tmp_path, "L")  # 600 images, 150 held out for test
    val_size = 1347 if source == "digits" else 450
    spec = DataSpec(source=source, root=str(tmp_path), val_size=val_size)
    with pytest.raises(DataError, match=r"leaves no training image.*lower `data.val_size`"):
        check_splits(spec)
    with pytest.raises(DataError, match=r"leaves no training image"):
        prepare_data(spec)
    check_splits(DataSpec(source=source, root=str(tmp_path), val_size=val_size - 10))


@pytest.mark.parametrize("file_found", [True, False])
def test_digits_are_scikit_learns_load_digits_image_for_image(monkeypatch, file_found):
    # Reference: scikit-learn's own `load_digits`. The source reads the same bundled file
    # without importing scikit-learn, and falls back to `load_digits` where that file is not.
    from kablate.data import sources

    if not file_found:
        monkeypatch.setattr(sources.importlib.util, "find_spec", lambda name: None)
    sources.digits_table.cache_clear()
    try:
        pools = SOURCES["digits"].read(DataSpec(source="digits"))
        labels, _ = SOURCES["digits"].labels(DataSpec(source="digits"))
    finally:
        sources.digits_table.cache_clear()  # later tests read the file again, as shipped
    bunch = load_digits()
    expected = torch.from_numpy(bunch.images.astype(np.float32) / 16.0).unsqueeze(1)
    assert pools.train.images.dtype == torch.float32
    assert torch.equal(pools.train.images, expected)
    assert torch.equal(pools.train.labels, torch.from_numpy(bunch.target.astype(np.int64)))
    assert np.array_equal(labels, bunch.target)
    assert pools.test is None
