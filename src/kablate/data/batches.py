"""In-memory batching with batched augmentation: no per-sample Python in the hot loop.

Order and augmentation come from generators seeded by (seed, epoch) only, so every variant
trained with the same seed sees the same batches in the same order with the same crops and
flips (the paired design), and a resumed trial can recreate any epoch's batches.

Images arrive in ``channels_last`` memory format (see `kablate.data.prepare`); indexing,
cropping and flipping keep that format, so no batch is copied just to change its layout.
"""

from __future__ import annotations

from collections.abc import Iterator

import torch
import torch.nn.functional as F

from kablate.spec.schema import AugmentSpec

ORDER, AUGMENT = 0, 1  # the two random streams of an epoch


def epoch_generator(seed: int, epoch: int, stream: int) -> torch.Generator:
    """A generator for one (seed, epoch, stream); stream ``ORDER`` or ``AUGMENT``."""
    return torch.Generator().manual_seed((seed * 1_000_003 + epoch) * 7 + stream)


def random_crop(x: torch.Tensor, padding: int, gen: torch.Generator) -> torch.Tensor:
    """Zero-pad by ``padding`` and take a random crop of the original size, per sample.

    A strided view holds every one of the (2p+1)² shifted windows of each padded image without
    copying; one gather then picks each sample's window. The result is a new tensor.
    """
    n, c, h, w = x.shape
    k = 2 * padding + 1
    padded = F.pad(x, (padding, padding, padding, padding))
    dy = torch.randint(0, k, (n,), generator=gen)
    dx = torch.randint(0, k, (n,), generator=gen)
    sn, sc, sh, sw = padded.stride()
    windows = padded.as_strided((n, k, k, c, h, w), (sn, sh, sw, sc, sh, sw))
    return windows[torch.arange(n), dy, dx]


def random_hflip_(x: torch.Tensor, gen: torch.Generator) -> torch.Tensor:
    """Mirror each image left-right with probability 1/2, in place."""
    flip = (torch.rand(x.shape[0], generator=gen) < 0.5).nonzero().squeeze(1)
    x[flip] = x[flip].flip(3)
    return x


def augment(x: torch.Tensor, spec: AugmentSpec, gen: torch.Generator) -> torch.Tensor:
    """Crop, then flip, a batch that the caller owns (it may be changed in place)."""
    if spec.crop_padding:
        x = random_crop(x, spec.crop_padding, gen)
    if spec.hflip:
        x = random_hflip_(x, gen)
    return x


def train_batches(
    images: torch.Tensor,
    labels: torch.Tensor,
    batch_size: int,
    seed: int,
    epoch: int,
    spec: AugmentSpec,
) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
    """One epoch of shuffled, augmented, channels_last batches. The last short batch is kept."""
    order = torch.randperm(len(labels), generator=epoch_generator(seed, epoch, ORDER))
    aug_gen = epoch_generator(seed, epoch, AUGMENT)
    for start in range(0, len(order), batch_size):
        idx = order[start : start + batch_size]
        x = augment(images[idx], spec, aug_gen)  # images[idx] is a fresh copy: ours to change
        yield x.contiguous(memory_format=torch.channels_last), labels[idx]


def eval_batches(
    images: torch.Tensor, labels: torch.Tensor, batch_size: int
) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
    """Consecutive slices, in order, without augmentation."""
    for start in range(0, len(labels), batch_size):
        x = images[start : start + batch_size]
        yield x.contiguous(memory_format=torch.channels_last), labels[start : start + batch_size]
