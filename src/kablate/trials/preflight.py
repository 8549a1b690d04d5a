"""The preflight: what `kablate run` (and `kablate plan`) check in their first seconds, so that
a run that cannot work stops before the night starts instead of at 2 a.m.

1. The folders it will write can be written (`results.write.writable_folder`).
2. One training step of the most expensive variant fits the machine's free memory
   (`check_memory`): an estimate from the variant's static costs, times the workers, against
   ``MemAvailable`` in /proc/meminfo. Nothing is allocated before this check passes.
3. That variant trains one real step and evaluates one batch (`try_one_step`): the recipe's
   optimiser, learning rate at step 0, augmentation and largest seed, on a batch of the data
   (or, for `plan`, random images of the data's shape).

Every failure is a `UsageError`: the CLI prints one line and exits with code 2.
"""

from __future__ import annotations

import re
from pathlib import Path

import torch

from kablate.costs.catalog import Catalog, CostedVariant
from kablate.data.batches import augment, train_batches
from kablate.data.prepare import PreparedData
from kablate.errors import UsageError
from kablate.nets.build import build_network
from kablate.train.loop import EVAL_BATCH, make_optimizer, set_lr, step_count, train_step

MEMINFO = Path("/proc/meminfo")
# The backward pass holds gradients of the saved activations while it frees them, about as
# much again as what was saved (common practice headroom: twice the saved activations).
ACT_FACTOR = 2
# fp32 weights, their gradients and up to two optimiser buffers (AdamW's moments) per parameter
STATE_BYTES_PER_PARAM = 4 * 4


def available_memory(meminfo: Path | None = None) -> int | None:
    """``MemAvailable`` from /proc/meminfo in bytes (the kernel's estimate of what can be
    allocated without swapping); None where there is no such file."""
    try:
        text = (meminfo or MEMINFO).read_text()
    except OSError:
        return None
    match = re.search(r"^MemAvailable:\s+(\d+)\s*kB", text, re.MULTILINE)
    return int(match.group(1)) * 1024 if match else None


def step_bytes(item: CostedVariant, batch_size: int) -> int:
    """What one training step of ``item`` needs, by estimate: its saved activations with the
    backward pass's headroom, its parameters with gradients and optimiser state, and the input
    batch twice (the batch and its augmented copy)."""
    c, h, w = item.blueprint.in_shape
    batch = 2 * batch_size * c * h * w * 4
    return ACT_FACTOR * item.cost.act_mem_bytes + STATE_BYTES_PER_PARAM * item.cost.params + batch


def heaviest(catalog: Catalog) -> CostedVariant:
    """The variant whose training step needs the most memory; MACs break ties."""
    batch_size = catalog.sweep.recipe.batch_size
    return max(catalog.variants, key=lambda v: (step_bytes(v, batch_size), v.cost.macs))


def gib(n: float) -> str:
    return f"{n / 2**30:.1f} GiB" if n >= 2**30 else f"{n / 2**20:.0f} MiB"


def check_memory(catalog: Catalog, n_workers: int = 1, data_bytes: int = 0) -> None:
    """Refuse a sweep whose most expensive training step, in every worker at once, would not
    fit the machine's available memory.

    ``data_bytes`` is the prepared data this process holds already (it is out of
    ``MemAvailable`` by now). One worker trains in this process and needs no other copy; each
    of several worker processes prepares its own (`pool.worker_main`), so they need one each.

    Raises:
        UsageError: naming the variant, the estimate and what is available.
    """
    free = available_memory()
    if free is None:
        return
    item = heaviest(catalog)
    batch_size = catalog.sweep.recipe.batch_size
    one = step_bytes(item, batch_size)
    need = one if n_workers <= 1 else n_workers * (one + data_bytes)
    if need > free:
        workers = (
            f" ({gib(need)} for {n_workers} worker processes, each with its copy of the data: "
            f"{gib(data_bytes)})"
            if n_workers > 1
            else ""
        )
        raise UsageError(
            f"{catalog.sweep.source}: one training step of variant {item.name} at batch size "
            f"{batch_size} needs about {gib(one)}{workers}, but this machine has "
            f"{gib(free)} available (MemAvailable): lower `recipe.batch_size` or the channels"
            + (", or run fewer --workers" if n_workers > 1 else "")
        )


def try_one_step(catalog: Catalog, data: PreparedData | None = None, device: str = "cpu") -> None:
    """Train the most expensive variant for one step and evaluate one batch.

    Raises:
        UsageError: the step or the evaluation failed (an allocation, a device, a value that
            overflows), naming the variant and torch's first line.
    """
    item = heaviest(catalog)
    recipe, seed = catalog.sweep.recipe, max(catalog.sweep.seeds)
    try:
        torch.manual_seed(seed)
        model = build_network(item.blueprint).to(device, memory_format=torch.channels_last)
        optimizer = make_optimizer(model, recipe)
        x, y, n_train, eval_x = sample_batch(catalog, data, seed)
        set_lr(optimizer, recipe, 0, step_count(recipe, n_train))
        model.train()
        train_step(model, optimizer, x.to(device), y.to(device), recipe)
        model.eval()
        with torch.no_grad():
            model(eval_x.to(device))
    except (RuntimeError, ValueError, OverflowError, MemoryError) as exc:
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        raise UsageError(
            f"{catalog.sweep.source}: the preflight could not train one step of variant "
            f"{item.name} (the most expensive) at batch size {recipe.batch_size} on {device}: "
            f"{type(exc).__name__}: {first[:300]}"
        ) from None


def sample_batch(
    catalog: Catalog, data: PreparedData | None, seed: int
) -> tuple[torch.Tensor, torch.Tensor, int, torch.Tensor]:
    """(images, labels, training-set size, an evaluation batch): the data's first training
    batch of the trial seed's epoch 0, or random images of the data's shape."""
    recipe = catalog.sweep.recipe
    if data is not None:
        train = data.train
        batches = train_batches(
            train.images, train.labels, recipe.batch_size, seed, 0, recipe.augment
        )
        x, y = next(batches)
        return x, y, len(train.labels), data.val.images[:EVAL_BATCH]
    gen = torch.Generator().manual_seed(seed)
    x = torch.rand(recipe.batch_size, *catalog.in_shape, generator=gen)
    x = augment(x, recipe.augment, gen).contiguous(memory_format=torch.channels_last)
    y = torch.randint(0, catalog.n_classes, (recipe.batch_size,), generator=gen)
    return x, y, recipe.batch_size, x[:EVAL_BATCH]


def run_preflight(
    catalog: Catalog, data: PreparedData | None = None, n_workers: int = 1, device: str = "cpu"
) -> None:
    """Check memory, then train one step and evaluate one batch (see the module docstring)."""
    data_bytes = 0
    if data is not None:
        splits = (data.train, data.val, data.test)
        data_bytes = sum(s.images.numel() * s.images.element_size() for s in splits)
    check_memory(catalog, n_workers, data_bytes)
    try_one_step(catalog, data, device)
