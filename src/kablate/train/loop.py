"""One trial: train one variant with one seed under one recipe, then evaluate it.

Read top to bottom: build the model, restore a checkpoint if there is one, run the epochs
(validation after each), then test with the best-validation or last weights as the recipe
says. Everything random is seeded by ``seed`` alone, so the same variant and seed give the
same numbers on the same machine, and every variant sees the same batches (paired design).
"""

from __future__ import annotations

import copy
import math
import time
from collections.abc import Callable
from pathlib import Path

import torch
import torch.nn.functional as F
from torch import nn

from kablate.data.batches import eval_batches, train_batches
from kablate.data.prepare import PreparedData, Split
from kablate.nets.build import build_network
from kablate.nets.layout import Layout
from kablate.spec.schema import RecipeSpec
from kablate.train.checkpoint import load_checkpoint, save_checkpoint
from kablate.train.record import EpochRecord, TrialRecord
from kablate.train.schedule import get_lr_factor

EVAL_BATCH = 512
CHECKPOINT = "checkpoint.pt"


class TrialInterrupted(Exception):
    """Raised between batches when the runner asks the trial to stop (Ctrl-C)."""


def make_optimizer(model: nn.Module, recipe: RecipeSpec) -> torch.optim.Optimizer:
    # No weight decay on norm parameters and biases (common practice).
    decay = [p for p in model.parameters() if p.ndim > 1]
    no_decay = [p for p in model.parameters() if p.ndim <= 1]
    groups = [
        {"params": decay, "weight_decay": recipe.weight_decay},
        {"params": no_decay, "weight_decay": 0.0},
    ]
    if recipe.optimizer == "sgd":
        return torch.optim.SGD(groups, lr=recipe.lr, momentum=recipe.momentum, nesterov=True)
    return torch.optim.AdamW(groups, lr=recipe.lr)


@torch.no_grad()
def evaluate(model: nn.Module, split: Split, device: torch.device) -> tuple[float, float]:
    """Mean cross-entropy and accuracy on a split, in eval mode."""
    model.eval()
    loss_sum, correct = torch.zeros((), device=device), torch.zeros((), device=device)
    for x, y in eval_batches(split.images, split.labels, EVAL_BATCH):
        logits = model(x)
        loss_sum += F.cross_entropy(logits, y, reduction="sum")
        correct += (logits.argmax(1) == y).sum()
    n = max(1, len(split.labels))
    return float(loss_sum) / n, float(correct) / n


def _to_device(data: PreparedData, device: torch.device) -> tuple[Split, Split, Split]:
    def move(s: Split) -> Split:
        return Split(s.images.to(device), s.labels.to(device), s.indices)

    return move(data.train), move(data.val), move(data.test)


def train_trial(
    layout: Layout,
    recipe: RecipeSpec,
    data: PreparedData,
    seed: int,
    workdir: Path | None = None,
    threads: int = 1,
    device: str = "cpu",
    should_stop: Callable[[], bool] | None = None,
) -> TrialRecord:
    """Train ``layout`` with ``seed``; checkpoint into ``workdir`` after every epoch.

    A NaN or inf loss ends the trial with status ``diverged`` (its curve is kept).

    Raises:
        TrialInterrupted: ``should_stop()`` became true; the last epoch checkpoint remains.
    """
    torch.set_num_threads(threads)
    dev = torch.device(device)
    train, val, test = _to_device(data, dev)
    torch.manual_seed(seed)
    model = build_network(layout).to(dev, memory_format=torch.channels_last)
    optimizer = make_optimizer(model, recipe)
    steps_per_epoch = math.ceil(len(train.labels) / recipe.batch_size)
    total_steps = recipe.epochs * steps_per_epoch
    if recipe.max_steps:
        total_steps = min(total_steps, recipe.max_steps)

    record = TrialRecord(threads=threads)
    start_epoch, step, samples, step_seconds, best_state = 0, 0, 0, 0.0, None
    ckpt_path = workdir / CHECKPOINT if workdir else None
    saved = load_checkpoint(ckpt_path) if ckpt_path else None
    if saved is not None:
        model.load_state_dict(saved["model"])
        optimizer.load_state_dict(saved["optimizer"])
        torch.set_rng_state(saved["rng"])
        best_state = saved["best_state"]
        start_epoch, step, samples = saved["epoch"] + 1, saved["step"], saved["samples"]
        step_seconds = saved["step_seconds"]
        record = TrialRecord.from_dict(saved["record"])
        record.note = f"resumed at epoch {start_epoch}"

    trial_start = time.perf_counter() - record.train_seconds
    for epoch in range(start_epoch, recipe.epochs):
        if step >= total_steps:
            break
        epoch_start = time.perf_counter()
        model.train()
        loss_sum, seen = torch.zeros((), device=dev), 0
        for x, y in train_batches(
            train.images, train.labels, recipe.batch_size, seed, epoch, recipe.augment
        ):
            if should_stop is not None and should_stop():
                raise TrialInterrupted(f"stopped in epoch {epoch}")
            if step >= total_steps:
                break
            for group in optimizer.param_groups:
                group["lr"] = recipe.lr * get_lr_factor(step, total_steps, steps_per_epoch, recipe)
            loss = F.cross_entropy(model(x), y, label_smoothing=recipe.label_smoothing)
            if not torch.isfinite(loss):
                record.status, record.note = "diverged", f"loss was {float(loss)} at step {step}"
                break
            optimizer.zero_grad(set_to_none=True)
            loss.backward()
            optimizer.step()
            step += 1
            loss_sum += loss.detach() * len(y)
            seen += len(y)
        samples += seen
        step_seconds += time.perf_counter() - epoch_start
        if record.status == "diverged":
            break
        val_loss, val_acc = evaluate(model, val, dev)
        record.curve.append(
            EpochRecord(
                epoch,
                float(loss_sum) / max(1, seen),
                val_loss,
                val_acc,
                time.perf_counter() - epoch_start,
            )
        )
        if not record.best_val_acc >= val_acc:  # also true while best is still NaN
            record.best_val_acc, record.best_epoch = val_acc, epoch
            best_state = copy.deepcopy(model.state_dict())
        record.steps = step
        record.train_seconds = time.perf_counter() - trial_start
        if ckpt_path is not None:
            save_checkpoint(
                ckpt_path,
                {
                    "model": model.state_dict(),
                    "optimizer": optimizer.state_dict(),
                    "rng": torch.get_rng_state(),
                    "best_state": best_state,
                    "epoch": epoch,
                    "step": step,
                    "samples": samples,
                    "step_seconds": step_seconds,
                    "record": record.to_dict(),
                },
            )

    record.steps = step
    record.train_seconds = time.perf_counter() - trial_start
    record.samples_per_second = samples / max(step_seconds, 1e-9)
    if record.status == "diverged":
        return record
    if recipe.test_from == "best" and best_state is not None:
        model.load_state_dict(best_state)
    _, record.test_acc = evaluate(model, test, dev)
    return record
