"""Turn a `DataSpec` into the train, validation and test tensors every trial of a sweep uses.

Model selection uses validation only. Normalisation statistics come from the training subset
only. The indices of every split are kept so that a report can say exactly what data was used.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np
import torch

from kablate.data.sources import SOURCES, ImageSet, require_classes
from kablate.data.splits import balanced_subset, stratified_split
from kablate.errors import DataError
from kablate.spec.schema import DataSpec


@dataclass(frozen=True)
class Split:
    images: torch.Tensor  # normalised float32, (N, C, H, W) in channels_last memory format
    labels: torch.Tensor
    indices: np.ndarray  # into the source's pool it came from


@dataclass(frozen=True)
class PreparedData:
    spec: DataSpec
    train: Split
    val: Split
    test: Split
    classes: tuple[str, ...]
    mean: tuple[float, ...]
    std: tuple[float, ...]
    test_pool: str  # "test split" or "held out from the training pool"
    stop: Split | None = None  # the early-stopping fold, carved from the training pool

    @property
    def in_shape(self) -> tuple[int, int, int]:
        c, h, w = self.train.images.shape[1:]
        return int(c), int(h), int(w)

    @property
    def n_classes(self) -> int:
        return len(self.classes)

    def manifest(self) -> dict:
        """What data was used, for the results folder and the report."""

        def digest(split: Split) -> str:
            return hashlib.sha1(split.indices.astype(np.int64).tobytes()).hexdigest()[:12]

        return {
            "source": self.spec.source,
            "test_pool": self.test_pool,
            "sizes": {
                "train": len(self.train.labels),
                "val": len(self.val.labels),
                "test": len(self.test.labels),
                **({"stop": len(self.stop.labels)} if self.stop is not None else {}),
            },
            "n_classes": self.n_classes,
            "classes": list(self.classes),
            "in_shape": list(self.in_shape),
            "mean": list(self.mean),
            "std": list(self.std),
            "indices_sha1": {
                "train": digest(self.train),
                "val": digest(self.val),
                "test": digest(self.test),
            },
            "indices": {
                "train": self.train.indices.tolist(),
                "val": self.val.indices.tolist(),
                "test": self.test.indices.tolist(),
                **({"stop": self.stop.indices.tolist()} if self.stop is not None else {}),
            },
            # The true class of every scored image, in the order of "indices" (the evidence).
            "labels": {
                "val": self.val.labels.tolist(),
                "test": self.test.labels.tolist(),
            },
        }


def split_indices(
    spec: DataSpec, labels: np.ndarray, test_labels: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(train, val, stop, test) indices: into the training pool, and into the test split if
    there is one (``test_labels``), else into the training pool too. ``stop`` is the
    early-stopping fold (empty unless ``data.stop_size``).

    Raises:
        DataError: fewer than two classes, a subset larger than what is left, or no training
            image left once validation (and a held-out test share) are taken.
    """
    require_classes(len(np.unique(labels)), f"the training pool of dataset {spec.source}")
    if test_labels is None:
        rest, test_idx = stratified_split(labels, spec.test_fraction, spec.split_seed)
        test_labels = labels
    else:
        rest, test_idx = np.arange(len(labels)), np.arange(len(test_labels))
    val_idx, rest = balanced_subset(labels, rest, spec.val_size, spec.split_seed + 1, "val_size")
    stop_idx = np.array([], dtype=np.int64)
    if spec.stop_size:
        stop_idx, rest = balanced_subset(
            labels, rest, spec.stop_size, spec.split_seed + 4, "stop_size"
        )
    train_idx, _ = balanced_subset(labels, rest, spec.train_size, spec.split_seed + 2, "train_size")
    if len(train_idx) == 0:
        held = f" and the test share {len(test_idx)}" if test_labels is labels else ""
        raise DataError(
            f"dataset {spec.source} leaves no training image: its training pool has "
            f"{len(labels)} images, `data.val_size` takes {len(val_idx)}{held}; "
            "lower `data.val_size`"
        )
    test_idx, _ = balanced_subset(
        test_labels, test_idx, spec.test_size, spec.split_seed + 3, "test_size"
    )
    return train_idx, val_idx, stop_idx, test_idx


def check_splits(spec: DataSpec) -> None:
    """Cut the splits from the labels alone, where the source can list them cheaply (digits,
    an image folder), so that `kablate plan` refuses splits that `run` would refuse. Other
    sources are checked when `prepare_data` reads them, still before anything trains.

    Raises:
        DataError: as `split_indices`.
    """
    reader = SOURCES[spec.source].labels
    if reader is not None:
        split_indices(spec, *reader(spec))


def prepare_data(spec: DataSpec) -> PreparedData:
    """Load the source and cut the fixed-seed, class-balanced splits.

    Raises:
        DataError: the dataset is missing or unreadable, a subset asks for more images than
            there are, or the images do not have the source's shape.
    """
    source = SOURCES[spec.source]
    pools = source.read(spec)
    pool = pools.train
    shape = tuple(pool.images.shape[1:])
    if source.shape is not None and shape != source.shape:
        raise DataError(
            f"dataset {spec.source} under {spec.root} has images of shape {shape}, but "
            f"{spec.source} images are {source.shape} (channels, height, width)"
        )
    test_set = pool if pools.test is None else pools.test
    test_labels = None if pools.test is None else pools.test.labels.numpy()
    train_idx, val_idx, stop_idx, test_idx = split_indices(spec, pool.labels.numpy(), test_labels)
    test_pool = (
        "held out from the training pool (stratified)"
        if pools.test is None
        else "the source's test split"
    )
    # Normalisation statistics from the training subset only (no peeking at val or test).
    train_images = pool.as_float(torch.from_numpy(train_idx)).double()
    mean = train_images.mean(dim=(0, 2, 3)).float()
    std = train_images.std(dim=(0, 2, 3)).float().clamp_min(1e-6)
    del train_images

    def cut(source: ImageSet, idx: np.ndarray) -> Split:
        t = torch.from_numpy(idx)
        images = (source.as_float(t) - mean[None, :, None, None]) / std[None, :, None, None]
        # channels_last once here, so that batches are sliced without a layout copy.
        images = images.contiguous(memory_format=torch.channels_last)
        return Split(images, source.labels[t].clone(), idx)

    return PreparedData(
        spec=spec,
        train=cut(pool, train_idx),
        val=cut(pool, val_idx),
        test=cut(test_set, test_idx),
        classes=pool.classes,
        mean=tuple(float(m) for m in mean),
        std=tuple(float(s) for s in std),
        test_pool=test_pool,
        stop=cut(pool, stop_idx) if spec.stop_size else None,
    )
