"""In-memory batching with batched augmentation: no per-sample Python in the hot loop.

Order and augmentation come from generators seeded by (seed, epoch) only, so every variant
trained with the same seed sees the same batches in the same order with the same crops and
flips (the paired design), and a resumed trial can recreate any epoch's batches.
"""

from __future__ import annotations

from collections.abc import Iterator

import torch
import torch.nn.functional as F

from kablate.spec.schema import AugmentSpec


def epoch_generator(seed: int, epoch: int, stream: int) -> torch.Generator:
    """A generator for one (seed, epoch, stream); stream 0 = order, 1 = augmentation."""
    return torch.Generator().manual_seed((seed * 1_000_003 + epoch) * 7 + stream)


def random_crop(x: torch.Tensor, padding: int, gen: torch.Generator) -> torch.Tensor:
    """Zero-pad by ``padding`` and take a random crop of the original size, per sample,
    with one gather for the whole batch."""
    n, _, h, w = x.shape
    padded = F.pad(x, (padding, padding, padding, padding))
    dy = torch.randint(0, 2 * padding + 1, (n,), generator=gen)
    dx = torch.randint(0, 2 * padding + 1, (n,), generator=gen)
    rows = (dy[:, None] + torch.arange(h)[None, :])[:, None, :, None]  # (N, 1, H, 1)
    cols = (dx[:, None] + torch.arange(w)[None, :])[:, None, None, :]  # (N, 1, 1, W)
    batch = torch.arange(n)[:, None, None, None]
    chans = torch.arange(x.shape[1])[None, :, None, None]
    return padded[batch, chans, rows, cols]


def random_hflip(x: torch.Tensor, gen: torch.Generator) -> torch.Tensor:
    flip = torch.rand(x.shape[0], generator=gen) < 0.5
    return torch.where(flip[:, None, None, None], x.flip(3), x)


def augment(x: torch.Tensor, spec: AugmentSpec, gen: torch.Generator) -> torch.Tensor:
    if spec.crop_padding:
        x = random_crop(x, spec.crop_padding, gen)
    if spec.hflip:
        x = random_hflip(x, gen)
    return x


def train_batches(images: torch.Tensor, labels: torch.Tensor, batch_size: int, seed: int,
                  epoch: int, spec: AugmentSpec) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
    """One epoch of shuffled, augmented, channels_last batches. The last short batch is kept."""
    order = torch.randperm(len(labels), generator=epoch_generator(seed, epoch, 0))
    aug_gen = epoch_generator(seed, epoch, 1)
    for start in range(0, len(order), batch_size):
        idx = order[start:start + batch_size]
        x = augment(images[idx], spec, aug_gen)
        yield x.contiguous(memory_format=torch.channels_last), labels[idx]


def eval_batches(images: torch.Tensor, labels: torch.Tensor,
                 batch_size: int) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
    for start in range(0, len(labels), batch_size):
        x = images[start:start + batch_size]
        yield x.contiguous(memory_format=torch.channels_last), labels[start:start + batch_size]
