"""Damaged or foreign dataset files are named before a reader trips on them: IDX headers are
checked against the layout published with the MNIST database (two zero bytes, type byte 0x08,
a dimension count, big-endian int32 sizes), written here with struct and read back by
torchvision's own reader; checksums are MD5 as hashlib computes them, against the sums that
torchvision's CIFAR-10 class declares."""

from __future__ import annotations

import hashlib
import struct

import numpy as np
import pytest
import torch
from torchvision.datasets import CIFAR10
from torchvision.datasets.mnist import read_image_file

from kablate.data.integrity import check_idx_pair, checksum_mismatch, file_md5, idx_dims
from kablate.errors import DataError


def idx(path, array: np.ndarray, type_byte: int = 0x08, extra: bytes = b"") -> None:
    header = struct.pack(">BBBB", 0, 0, type_byte, array.ndim)
    header += struct.pack(f">{array.ndim}I", *array.shape)
    path.write_bytes(header + array.astype(np.uint8).tobytes() + extra)


def test_a_well_formed_file_gives_its_dimensions_as_torchvision_reads_them(tmp_path):
    images = np.arange(5 * 4 * 3).reshape(5, 4, 3) % 256
    idx(tmp_path / "images", images)
    assert idx_dims(tmp_path / "images", 3) == (5, 4, 3)
    read = read_image_file(str(tmp_path / "images"))  # torchvision's IDX reader
    assert tuple(read.shape) == (5, 4, 3) and torch.equal(read, torch.from_numpy(images).byte())


@pytest.mark.parametrize(
    ("type_byte", "extra", "n_dims", "message"),
    [
        (0x0D, b"", 3, "IDX type byte 0x0D"),  # floats
        (0x08, b"\0", 3, r"is 77 bytes, but its header \(5 × 4 × 3\) makes it 76"),  # 16 + 60
        (0x08, b"", 1, "has 3 dimension\\(s\\) in its header, but labels need 1"),
    ],
)
def test_a_foreign_or_damaged_file_is_named_with_what_is_wrong(
    tmp_path, type_byte, extra, n_dims, message
):
    path = tmp_path / "images"
    idx(path, np.zeros((5, 4, 3)), type_byte, extra)
    with pytest.raises(DataError, match=message) as caught:
        idx_dims(path, n_dims)
    assert str(path.resolve()) in str(caught.value)
    (tmp_path / "text").write_text("not idx")
    with pytest.raises(DataError, match="is not an IDX file"):
        idx_dims(tmp_path / "text", 3)


def test_images_and_labels_must_hold_as_many_items(tmp_path):
    idx(tmp_path / "images", np.zeros((5, 2, 2)))
    idx(tmp_path / "labels", np.zeros(4))
    with pytest.raises(DataError, match="holds 5 images but .* holds 4 labels"):
        check_idx_pair(tmp_path / "images", tmp_path / "labels")


def test_a_cifar_file_that_fails_torchvisions_declared_md5_is_named(tmp_path):
    folder = tmp_path / CIFAR10.base_folder
    folder.mkdir()
    name, declared = CIFAR10.train_list[0]
    (folder / name).write_bytes(b"not the published batch")
    assert file_md5(folder / name) == hashlib.md5(b"not the published batch").hexdigest()
    message = checksum_mismatch(CIFAR10, tmp_path)
    assert (
        f"{(folder / name).resolve()} has MD5 {file_md5(folder / name)}, expected {declared}"
        in message
    )
    assert message.count(" has MD5 ") == 1  # the absent files are not named
    assert checksum_mismatch(CIFAR10, tmp_path / "elsewhere") is None
