"""Checks that find a damaged or foreign dataset file and name it, before a reader trips on it.

torchvision's readers fail on such files with errors that name no file (``KeyError: 10`` for an
unknown IDX type byte) or with "not found or corrupted" for a file that is present but fails its
checksum. These checks run first (IDX headers) or after such a failure (checksums) and say which
file is wrong and how.
"""

from __future__ import annotations

import hashlib
import math
import struct
from pathlib import Path

from kablate.errors import DataError

IDX_UBYTE = 0x08  # the IDX type byte of unsigned bytes, the type MNIST-style files use


def idx_dims(path: Path, n_dims: int) -> tuple[int, ...]:
    """The dimensions in an IDX file's header, after checking it against the file.

    The layout is the one published with the MNIST database (LeCun, Cortes & Burges): two zero
    bytes, a type byte, a dimension count, one big-endian int32 per dimension, then the data.

    Raises:
        DataError: naming the file, when it is not an IDX file of unsigned bytes with
            ``n_dims`` dimensions, or its size differs from what its header says.
    """
    with open(path, "rb") as f:
        head = f.read(4 + 4 * n_dims)
    if len(head) < 4 or head[:2] != b"\0\0":
        raise DataError(f"{path.resolve()} is not an IDX file (it must start with two zero bytes)")
    if head[2] != IDX_UBYTE:
        raise DataError(
            f"{path.resolve()} has IDX type byte 0x{head[2]:02X}, but images and labels must be "
            f"unsigned bytes (0x{IDX_UBYTE:02X}), as in the published MNIST-style files"
        )
    if head[3] != n_dims or len(head) < 4 + 4 * n_dims:
        raise DataError(
            f"{path.resolve()} has {head[3]} dimension(s) in its header, but "
            f"{'images need 3 (count, height, width)' if n_dims == 3 else 'labels need 1'}"
        )
    dims = struct.unpack(f">{n_dims}I", head[4:])
    expected = 4 + 4 * n_dims + math.prod(dims)
    size = path.stat().st_size
    if size != expected:
        raise DataError(
            f"{path.resolve()} is {size:,} bytes, but its header ({' × '.join(map(str, dims))}) "
            f"makes it {expected:,}: the file is truncated or has extra bytes"
        )
    return dims


def check_idx_pair(images: Path, labels: Path) -> None:
    """Refuse an IDX images file and labels file that do not hold the same number of items."""
    n_images, n_labels = idx_dims(images, 3)[0], idx_dims(labels, 1)[0]
    if n_images != n_labels:
        raise DataError(
            f"{images.resolve()} holds {n_images:,} images but {labels.resolve()} holds "
            f"{n_labels:,} labels; every image needs exactly one label"
        )


def checksum_mismatch(cls: type, root: Path) -> str | None:
    """A message naming every file of torchvision dataset ``cls`` that exists under ``root``
    but fails the MD5 sum torchvision declares for it; None when none does (or none is
    declared, as for MNIST)."""
    if hasattr(cls, "train_list"):  # CIFAR-10/100: (file name, md5) under base_folder
        declared = [(root / cls.base_folder / n, md5) for n, md5 in cls.train_list + cls.test_list]
    elif hasattr(cls, "split_list"):  # SVHN: split -> [url, file name, md5]
        declared = [
            (root / n, md5) for split, (_, n, md5) in cls.split_list.items() if split != "extra"
        ]
    else:
        return None
    bad = []
    for path, md5 in declared:
        if path.is_file():
            actual = file_md5(path)
            if actual != md5:
                bad.append(f"{path.resolve()} has MD5 {actual}, expected {md5}")
    if not bad:
        return None
    return (
        f"checksum mismatch in dataset {cls.__name__}: {'; '.join(bad)} (torchvision checks "
        "the published files' sums). The copy is damaged or not the published one: fetch it "
        "again, or delete it and set `data.download = true`"
    )


def file_md5(path: Path) -> str:
    digest = hashlib.md5(usedforsecurity=False)
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()
