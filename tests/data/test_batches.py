"""Batched augmentation matches torchvision's per-image operations; batches are paired."""

from __future__ import annotations

import torch
import torchvision.transforms.functional as TF

from kablate.data.batches import (
    AUGMENT,
    epoch_generator,
    eval_batches,
    random_crop,
    random_hflip_,
    train_batches,
)
from kablate.spec.schema import AugmentSpec


def images(n: int = 40, c: int = 3, h: int = 9, w: int = 7) -> torch.Tensor:
    x = torch.arange(n * c * h * w, dtype=torch.float32).reshape(n, c, h, w) + 1
    return x.contiguous(memory_format=torch.channels_last)


def test_random_crop_equals_torchvision_pad_then_crop_per_image():
    x, padding = images(), 2
    out = random_crop(x, padding, torch.Generator().manual_seed(5))
    # The same offsets, drawn again from the same generator in the same order.
    gen = torch.Generator().manual_seed(5)
    dy = torch.randint(0, 2 * padding + 1, (len(x),), generator=gen)
    dx = torch.randint(0, 2 * padding + 1, (len(x),), generator=gen)
    for i in range(len(x)):
        # torchvision's RandomCrop(padding=p): zero-pad, then crop at (top, left).
        expected = TF.crop(TF.pad(x[i], [padding], fill=0), int(dy[i]), int(dx[i]), 9, 7)
        assert torch.equal(out[i], expected)
    assert len({(int(a), int(b)) for a, b in zip(dy, dx, strict=True)}) > 5  # offsets vary


def test_random_hflip_equals_torchvision_hflip_on_the_chosen_images():
    x = images()
    out = random_hflip_(x.clone(), torch.Generator().manual_seed(2))
    chosen = torch.rand(len(x), generator=torch.Generator().manual_seed(2)) < 0.5
    assert 0 < int(chosen.sum()) < len(x)
    for i in range(len(x)):
        assert torch.equal(out[i], TF.hflip(x[i]) if chosen[i] else x[i])


def test_an_epoch_visits_every_image_once_in_channels_last_batches():
    x, y = images(37), torch.arange(37)
    spec = AugmentSpec(crop_padding=1, hflip=True)
    batches = list(train_batches(x, y, 8, seed=0, epoch=0, spec=spec))
    assert [len(b[1]) for b in batches] == [8, 8, 8, 8, 5]  # the last short batch is kept
    assert sorted(torch.cat([b[1] for b in batches]).tolist()) == list(range(37))
    assert all(b[0].is_contiguous(memory_format=torch.channels_last) for b in batches)
    assert [b[1] for b in eval_batches(x, y, 16)][2].tolist() == list(range(32, 37))


def test_batches_depend_on_seed_and_epoch_only():
    x, y = images(30), torch.arange(30)
    spec = AugmentSpec(crop_padding=2, hflip=True)

    def epoch(seed: int, n: int) -> list[tuple[torch.Tensor, torch.Tensor]]:
        return list(train_batches(x, y, 7, seed=seed, epoch=n, spec=spec))

    first, again = epoch(3, 1), epoch(3, 1)
    assert all(
        torch.equal(a[0], b[0]) and torch.equal(a[1], b[1])
        for a, b in zip(first, again, strict=True)
    )
    assert not torch.equal(torch.cat([b[1] for b in first]), torch.cat([b[1] for b in epoch(3, 2)]))
    assert not torch.equal(torch.cat([b[1] for b in first]), torch.cat([b[1] for b in epoch(4, 1)]))
    # The two streams are separate: augmentation draws do not shift the order.
    plain = list(train_batches(x, y, 7, seed=3, epoch=1, spec=AugmentSpec()))
    assert all(torch.equal(a[1], b[1]) for a, b in zip(first, plain, strict=True))
    assert epoch_generator(3, 1, AUGMENT).initial_seed() != epoch_generator(4, 1, 1).initial_seed()
