"""Benchmark: the trainer's throughput against its limit and against a plain hand-written loop.

Targets (issue: data and the CPU trainer), measured side by side in one run, same model, same
threads, one process:

- against the limit: trainer samples/s >= 0.9x the raw training step on pre-batched tensors
  of the same model and memory format (so data handling, logging and checkpoints cost <= 10%);
- against the peer: trainer >= 1.4x `plain_loop` on a CIFAR-sized variant (3x32x32 input,
  32-64-128 channels) with random crop + flip, for k=3 and k=5; the digits ratio is reported;
- for reference: the fp32 matmul peak (2048x2048 `torch.mm`) and the FLOP/s the trainer
  reaches for a 3x3 and a 7x7 variant (training FLOPs per sample counted by
  `torch.utils.flop_counter.FlopCounterMode` over one forward + backward).

CIFAR-10 cannot be downloaded on the development machines, so the CIFAR-sized data is real
images of the right size: scikit-learn's digits upsampled (bilinear) to 32x32 and repeated to
3 channels, written as PNGs into an image-folder tree and read through our `folder` source.
Speed does not depend on what the pixels show.

Every contender runs once per round after a warm-up round, rounds interleave them, and each
ratio is the median over rounds of the ratio within a round, because the machine is shared and
noisy.

Run: python tests/bench/bench_trainer.py [--threads 1] [--rounds 5] [--epochs 2]
(about five minutes on one core)
"""

from __future__ import annotations

import argparse
import dataclasses
import statistics
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F
from PIL import Image
from torch.utils.flop_counter import FlopCounterMode

from kablate.costs.catalog import build_catalog
from kablate.data.prepare import PreparedData, prepare_data
from kablate.nets.build import build_network
from kablate.nets.layout import Layout
from kablate.spec import load_sweep
from kablate.train.loop import make_optimizer, train_trial

REPO = Path(__file__).resolve().parents[2]

CIFAR_SIZED = """
[sweep]
name = "bench-trainer"
seeds = [0]

[data]
source = "folder"
root = "{root}"
val_size = 20        # small: the CPU figure of the trainer includes validation and test
test_fraction = 0.05

[network]
kernel = "3"
[network.stem]
out_ch = 32
[[network.stages]]
out_ch = 64
n_convs = 1
down = "maxpool"
[[network.stages]]
out_ch = 128
n_convs = 1
down = "maxpool"

[recipe]
epochs = {epochs}
batch_size = 128
lr = 0.05
warmup_epochs = 0.5
[recipe.augment]
crop_padding = 4
hflip = true

[[plan]]
name = "k3"
stem = "3"
body = "3"

[[plan]]
name = "k5"
stem = "5"
body = "5"

[[plan]]
name = "k7"
stem = "7"
body = "7"
"""


def write_cifar_sized_folder(root: Path) -> np.ndarray:
    """Digits upsampled to 32x32 RGB, written as PNGs (one folder per class); returns them in
    the order torchvision's ImageFolder lists the files (class folders, then file names), which
    is the order the `folder` source's indices refer to."""
    from sklearn.datasets import load_digits
    from torchvision.datasets import ImageFolder

    bunch = load_digits()
    small = torch.from_numpy(bunch.images.astype(np.float32) / 16.0)[:, None]
    big = F.interpolate(small, size=(32, 32), mode="bilinear", align_corners=False)
    rgb = (big.clamp(0, 1) * 255).round().to(torch.uint8).repeat(1, 3, 1, 1)
    hwc = rgb.permute(0, 2, 3, 1).numpy()
    for i, (img, label) in enumerate(zip(hwc, bunch.target, strict=True)):
        folder = root / str(label)
        folder.mkdir(parents=True, exist_ok=True)
        Image.fromarray(img).save(folder / f"{i:04d}.png")
    return hwc[[int(Path(path).stem) for path, _ in ImageFolder(str(root)).samples]]


# --- the contenders --------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class Rate:
    """Samples per second of wall time, and per second of this process's CPU time. With one
    thread the CPU figure does not count time lost to other programs on a shared machine."""

    wall: float
    cpu: float


class Clock:
    def __enter__(self) -> Clock:
        self.wall, self.cpu = time.perf_counter(), time.process_time()
        return self

    def __exit__(self, *exc) -> None:
        self.wall = time.perf_counter() - self.wall
        self.cpu = time.process_time() - self.cpu

    def rate(self, samples: int) -> Rate:
        return Rate(samples / self.wall, samples / self.cpu)


def trainer_rate(layout: Layout, recipe, data: PreparedData, threads: int) -> Rate:
    """Our trainer, end to end through `train_trial`, with per-epoch checkpoints on disk.

    Wall: the trainer's own samples/s, which covers batching, augmentation, the steps, logging
    and the checkpoints, and keeps the per-epoch validation out (model work, not overhead).
    CPU: the whole `train_trial` call, model building, validation and the final test included.
    """
    with tempfile.TemporaryDirectory() as tmp, Clock() as clock:
        record = train_trial(layout, recipe, data, seed=0, workdir=Path(tmp), threads=threads)
    return Rate(record.samples_per_second, clock.rate(recipe.epochs * len(data.train.labels)).cpu)


def raw_step_rate(layout: Layout, recipe, data: PreparedData, threads: int) -> Rate:
    """The limit: forward, loss, backward, optimizer step on batches sliced beforehand, with
    the same model, memory format (channels_last), optimizer and batch size, no augmentation."""
    torch.set_num_threads(threads)
    torch.manual_seed(0)
    model = build_network(layout).to(memory_format=torch.channels_last).train()
    optimizer = make_optimizer(model, recipe)
    x_all, y_all = data.train.images, data.train.labels
    bs = recipe.batch_size
    batches = [
        (x_all[i : i + bs].contiguous(memory_format=torch.channels_last), y_all[i : i + bs])
        for i in range(0, len(y_all), bs)
    ]
    with Clock() as clock:
        for _ in range(recipe.epochs):
            for x, y in batches:
                loss = F.cross_entropy(model(x), y, label_smoothing=recipe.label_smoothing)
                optimizer.zero_grad(set_to_none=True)
                loss.backward()
                optimizer.step()
    return clock.rate(recipe.epochs * len(y_all))


class PixelArrayDataset(torch.utils.data.Dataset):
    """Images held as a uint8 array, one PIL image per item: what torchvision's CIFAR10 does."""

    def __init__(self, pixels: np.ndarray, labels: np.ndarray, transform: Callable):
        self.pixels, self.labels, self.transform = pixels, labels, transform

    def __len__(self) -> int:
        return len(self.labels)

    def __getitem__(self, i: int):
        return self.transform(Image.fromarray(self.pixels[i])), int(self.labels[i])


def plain_loop_rate(
    layout: Layout, recipe, data: PreparedData, pixels: np.ndarray, threads: int
) -> Rate:
    """The peer: the loop a user writes by hand.

    A `DataLoader` (shuffle, the recipe's batch size, ``num_workers=0``: one process like our
    trainer) over a per-sample dataset that makes a PIL image per item and runs torchvision
    transforms on it: `RandomCrop(padding=...)` and `RandomHorizontalFlip` when the recipe
    augments, then `ToTensor` and `Normalize` with the same statistics. The model is the same
    network in the default memory format, with SGD (momentum 0.9, weight decay), cross-entropy,
    and the running loss read with ``loss.item()`` each step. Nothing in it is slowed down.
    """
    from torchvision import transforms

    torch.set_num_threads(threads)
    torch.manual_seed(0)
    steps: list = []
    if recipe.augment.crop_padding:
        steps.append(transforms.RandomCrop(pixels.shape[1], padding=recipe.augment.crop_padding))
    if recipe.augment.hflip:
        steps.append(transforms.RandomHorizontalFlip())
    steps += [transforms.ToTensor(), transforms.Normalize(data.mean, data.std)]
    dataset = PixelArrayDataset(
        pixels[data.train.indices], data.train.labels.numpy(), transforms.Compose(steps)
    )
    loader = torch.utils.data.DataLoader(
        dataset, batch_size=recipe.batch_size, shuffle=True, num_workers=0
    )
    model = build_network(layout).train()
    optimizer = torch.optim.SGD(
        model.parameters(), lr=recipe.lr, momentum=0.9, weight_decay=recipe.weight_decay
    )
    n = 0
    with Clock() as clock:
        for _ in range(recipe.epochs):
            running = 0.0
            for x, y in loader:
                optimizer.zero_grad()
                loss = F.cross_entropy(model(x), y)
                loss.backward()
                optimizer.step()
                running += loss.item()
                n += len(y)
    return clock.rate(n)


# --- reference figures -----------------------------------------------------------------


def matmul_peak(threads: int, n: int = 2048, repeats: int = 10) -> Rate:
    """Best fp32 FLOP/s of an n x n `torch.mm` (2 n^3 FLOPs each), by wall and by CPU time."""
    torch.set_num_threads(threads)
    a, b = torch.randn(n, n), torch.randn(n, n)
    torch.mm(a, b)
    wall = cpu = float("inf")
    for _ in range(repeats):
        with Clock() as clock:
            torch.mm(a, b)
        wall, cpu = min(wall, clock.wall), min(cpu, clock.cpu)
    return Rate(2 * n**3 / wall, 2 * n**3 / cpu)


def train_flops_per_sample(layout: Layout, data: PreparedData, batch: int = 32) -> float:
    """Forward + backward FLOPs of one training sample, counted by torch's FlopCounterMode."""
    model = build_network(layout).to(memory_format=torch.channels_last).train()
    x = data.train.images[:batch].contiguous(memory_format=torch.channels_last)
    y = data.train.labels[:batch]
    counter = FlopCounterMode(display=False)
    with counter:
        F.cross_entropy(model(x), y).backward()
    return counter.get_total_flops() / len(y)


# --- the run ---------------------------------------------------------------------------


def measure(contenders: dict[str, Callable[[], Rate]], rounds: int) -> dict[str, list[Rate]]:
    """Samples/s of every contender per round, after one warm-up round that is not kept
    (oneDNN builds its kernels for each new shape on first use)."""
    for run in contenders.values():
        run()
    rates: dict[str, list[Rate]] = {name: [] for name in contenders}
    for _ in range(rounds):
        for name, run in contenders.items():
            rates[name].append(run())
    return rates


def paired_ratio(rates: dict[str, list[Rate]], a: str, b: str, clock: str) -> float:
    """Median over rounds of a/b measured in the same round (drifts in load cancel)."""
    if a not in rates or b not in rates:
        return float("nan")
    pairs = zip(rates[a], rates[b], strict=True)
    return statistics.median(getattr(x, clock) / getattr(y, clock) for x, y in pairs)


def median_rate(values: list[Rate]) -> Rate:
    return Rate(statistics.median(v.wall for v in values), statistics.median(v.cpu for v in values))


def report_case(case: str, title: str, rates: dict[str, list[Rate]], results: list) -> None:
    print(f"\n{title}")
    for name, values in rates.items():
        med = median_rate(values)
        walls = ", ".join(f"{v.wall:,.0f}" for v in values)
        print(
            f"  {name:<9} median {med.wall:>8,.0f}/s wall, {med.cpu:>8,.0f}/s CPU"
            f"   (wall by round: {walls})"
        )
    results.append(
        (
            case,
            *(
                paired_ratio(rates, a, b, clock)
                for a, b in (("trainer", "raw step"), ("trainer", "plain"), ("raw step", "plain"))
                for clock in ("wall", "cpu")
            ),
        )
    )


def main() -> None:
    sys.stdout.reconfigure(line_buffering=True)
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--epochs", type=int, default=2, help="epochs per measurement")
    args = parser.parse_args()
    threads = args.threads
    print(f"torch {torch.__version__}, {threads} thread(s), {args.rounds} rounds")
    results: list[tuple] = []

    # Digits: the quickstart network and recipe on the real 8x8 digits. Validation and test
    # are kept small so that the CPU figure, which includes them, is mostly training.
    sweep = load_sweep(REPO / "sweeps" / "quickstart.toml")
    digits = prepare_data(dataclasses.replace(sweep.data, val_size=50, test_fraction=0.05))
    baseline = build_catalog(sweep).baseline.cost.layout
    recipe = dataclasses.replace(sweep.recipe, epochs=args.epochs * 3)
    pixels = digits_pixels()
    rates = measure(
        {
            "trainer": lambda: trainer_rate(baseline, recipe, digits, threads),
            "raw step": lambda: raw_step_rate(baseline, recipe, digits, threads),
            "plain": lambda: plain_loop_rate(baseline, recipe, digits, pixels, threads),
        },
        args.rounds,
    )
    title = "digits 1x8x8, quickstart all-3x3 network, batch 64, no augmentation"
    report_case("digits", title, rates, results)

    peak = matmul_peak(threads)
    flops: dict[str, Rate] = {}
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "digits32"
        pixels32 = write_cifar_sized_folder(root)
        path = Path(tmp) / "bench-trainer.toml"
        path.write_text(CIFAR_SIZED.format(root=root.as_posix(), epochs=args.epochs))
        sweep = load_sweep(path)
        catalog = build_catalog(sweep)
        data = prepare_data(sweep.data)
        recipe = sweep.recipe
        for k in ("k3", "k5", "k7"):
            layout = catalog.by_name(k).cost.layout
            contenders = {
                "trainer": lambda layout=layout: trainer_rate(layout, recipe, data, threads),
                "raw step": lambda layout=layout: raw_step_rate(layout, recipe, data, threads),
            }
            if k != "k7":  # k7 is measured for FLOP/s only
                contenders["plain"] = lambda layout=layout: plain_loop_rate(
                    layout, recipe, data, pixels32, threads
                )
            rates = measure(contenders, args.rounds)
            title = f"CIFAR-sized 3x32x32, 32-64-128 channels, {k}, batch 128, crop 4 + flip"
            report_case(k, title, rates, results)
            per_sample = train_flops_per_sample(layout, data)
            med = median_rate(rates["trainer"])
            flops[k] = Rate(med.wall * per_sample, med.cpu * per_sample)

    again = matmul_peak(threads)  # before and after: the better of the two
    peak = Rate(max(peak.wall, again.wall), max(peak.cpu, again.cpu))
    print("\nratios: median over rounds of the ratio within a round (wall time / CPU time)")
    print(
        f"  {'case':<8} {'trainer/raw step (>= 0.9)':>28} {'trainer/plain (>= 1.4)':>26}"
        f" {'raw step/plain (ceiling)':>27}"
    )
    for case, raw_wall, raw_cpu, plain_wall, plain_cpu, top_wall, top_cpu in results:
        print(
            f"  {case:<8} {raw_wall:>19.2f} / {raw_cpu:<6.2f}"
            f" {plain_wall:>17.2f} / {plain_cpu:<6.2f}"
            f" {top_wall:>18.2f} / {top_cpu:<6.2f}"
        )
    print(
        "  (raw step/plain is the most any trainer of this model and memory format can gain on\n"
        "  the plain loop: the more a step is convolution, the less data handling can save)"
    )
    print(
        f"\nfp32 matmul peak (2048^2 torch.mm, {threads} thread(s)): "
        f"{peak.wall / 1e9:,.1f} GFLOP/s by wall time, {peak.cpu / 1e9:,.1f} by CPU time"
    )
    for k in ("k3", "k7"):
        print(
            f"trainer, CIFAR-sized {k}: {flops[k].wall / 1e9:,.1f} GFLOP/s by wall time "
            f"({flops[k].wall / peak.wall:.0%} of peak), {flops[k].cpu / 1e9:,.1f} by CPU time "
            f"({flops[k].cpu / peak.cpu:.0%})"
        )
    if any(flops[k].wall > peak.wall for k in ("k3", "k7")):
        print(
            "  (above 100%: oneDNN's convolution kernels beat this matmul, which is a measured\n"
            "  reference, not the CPU's arithmetic ceiling)"
        )


def digits_pixels() -> np.ndarray:
    """The digits pool as uint8 HxW images (0..16 scaled to 0..255), indexed like the pool."""
    from sklearn.datasets import load_digits

    return np.round(load_digits().images * (255.0 / 16.0)).astype(np.uint8)


if __name__ == "__main__":
    main()
