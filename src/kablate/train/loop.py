"""One trial: train one variant with one seed under one recipe, then evaluate it.

Read top to bottom: build the model, restore a checkpoint if there is one, run the epochs
(validation after each, a checkpoint when one is due: `kablate.train.checkpoint`), then score
the chosen weights: validation and test accuracy and the class predicted for every validation
and test image (the evidence).

The scored weights are the last epoch's by default. A maximum over epochs of the accuracy on
the very images it is scored on would be biased upwards, and unequally across variants; so with
``recipe.test_from = "best"`` the epoch is chosen on a separate early-stopping fold carved from
the training pool (``data.stop_size``), never on the validation images.

Everything random is seeded by ``seed`` alone, so the same variant and seed give the same
numbers on the same machine, and every variant sees the same batches (paired design). A
resumed trial gives the numbers it would have given uninterrupted: a checkpoint written as the
trial was asked to stop holds the batches done in its epoch, and the resume rebuilds that
epoch's batches from (seed, epoch) and skips them.

The hot loop does only tensor work per step, besides three cheap Python checks (stop
requested, lr, loss finite). On CPU the finiteness check costs no synchronisation.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from kablate.data.batches import eval_batches, train_batches
from kablate.data.prepare import PreparedData, Split
from kablate.nets.build import build_network
from kablate.nets.layout import Layout
from kablate.nets.model_variant import ModelVariant
from kablate.results.evidence import encode_predictions
from kablate.results.paths import CHECKPOINT
from kablate.spec.schema import RecipeSpec
from kablate.train.checkpoint import (
    checkpoint_due,
    read_or_set_aside,
    resume_problem,
    save_checkpoint,
    set_aside,
)
from kablate.train.record import EpochRecord, TrialRecord, shown_epoch
from kablate.train.schedule import get_lr_factor

EVAL_BATCH = 512


class TrialInterrupted(Exception):
    """Raised between batches when the runner asks the trial to stop (Ctrl-C)."""


@dataclass
class TrialProgress:
    """Where a trial stands: everything a resume needs besides the weights."""

    record: TrialRecord
    epoch: int = 0  # the next epoch to run, or the one in progress
    step: int = 0
    samples: int = 0
    eval_seconds: float = 0.0  # validation time, kept out of samples per second
    best_state: dict[str, torch.Tensor] | None = None
    # Within ``epoch`` when it was stopped part-way: its batches done, their summed loss and
    # samples, and its seconds so far.
    batch: int = 0
    epoch_loss: torch.Tensor | None = None
    epoch_seen: int = 0
    epoch_seconds: float = 0.0


def make_optimizer(model: nn.Module, recipe: RecipeSpec) -> torch.optim.Optimizer:
    # No weight decay on norm parameters and biases (common practice).
    decay = [p for p in model.parameters() if p.ndim > 1]
    no_decay = [p for p in model.parameters() if p.ndim <= 1]
    groups = [
        {"params": decay, "weight_decay": recipe.weight_decay},
        {"params": no_decay, "weight_decay": 0.0},
    ]
    if recipe.optimizer == "sgd":
        nesterov = recipe.momentum > 0  # torch refuses Nesterov without momentum
        return torch.optim.SGD(groups, lr=recipe.lr, momentum=recipe.momentum, nesterov=nesterov)
    return torch.optim.AdamW(groups, lr=recipe.lr)


def warm_up(recipe: RecipeSpec) -> None:
    """Pay a process's one-time start-up costs of torch before the first trial.

    The first optimizer a process builds makes torch import its compiler stack (about 1 s on
    the development machine), which would otherwise be charged to the first trial's time and
    to the runner. A throw-away optimizer of the recipe's kind, stepped once, does it here.
    """
    weight = torch.zeros(2, 2, requires_grad=True)
    optimizer = make_optimizer(nn.ParameterList([weight]), recipe)
    weight.sum().backward()
    optimizer.step()


@dataclass(frozen=True)
class StepCount:
    """How many optimizer steps a trial takes: ``epochs`` full epochs, capped by
    ``max_steps``. The one count the trainer, the budget's timing and the preflight share."""

    per_epoch: int
    total: int
    epochs: int  # the epochs that take a step: fewer than recipe.epochs under max_steps


def step_count(recipe: RecipeSpec, n_train: int) -> StepCount:
    per_epoch = math.ceil(n_train / recipe.batch_size)
    total = recipe.epochs * per_epoch
    if recipe.max_steps:
        total = min(total, recipe.max_steps)
    return StepCount(per_epoch, total, min(recipe.epochs, math.ceil(total / per_epoch)))


def set_lr(optimizer: torch.optim.Optimizer, recipe: RecipeSpec, step: int, steps: StepCount):
    """The schedule's learning rate for optimizer step ``step`` (counted from 0)."""
    lr = recipe.lr * get_lr_factor(step, steps.total, steps.per_epoch, recipe)
    for group in optimizer.param_groups:
        group["lr"] = lr


def train_step(
    model: nn.Module,
    optimizer: torch.optim.Optimizer,
    x: torch.Tensor,
    y: torch.Tensor,
    recipe: RecipeSpec,
) -> tuple[torch.Tensor, bool]:
    """One training step on one batch: (the loss, whether it was finite). A non-finite loss
    makes no update. The trainer, the budget's timing and the preflight all step through here."""
    loss = F.cross_entropy(model(x), y, label_smoothing=recipe.label_smoothing)
    finite = bool(torch.isfinite(loss))
    if finite:
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        optimizer.step()
    return loss, finite


@torch.no_grad()
def evaluate(model: nn.Module, split: Split) -> tuple[float, float]:
    """Mean cross-entropy and accuracy on a split, in eval mode."""
    model.eval()
    loss_sum, correct = 0.0, 0
    for x, y in eval_batches(split.images, split.labels, EVAL_BATCH):
        logits = model(x)
        loss_sum += float(F.cross_entropy(logits, y, reduction="sum"))
        correct += int((logits.argmax(1) == y).sum())
    n = max(1, len(split.labels))
    return loss_sum / n, correct / n


@torch.no_grad()
def predict(model: nn.Module, split: Split) -> np.ndarray:
    """The predicted class of every image of a split, in the split's order, in eval mode."""
    model.eval()
    batches = eval_batches(split.images, split.labels, EVAL_BATCH)
    out = [model(x).argmax(1).cpu() for x, _ in batches]
    return torch.cat(out).numpy() if out else np.zeros(0, dtype=np.int64)


def score(model: nn.Module, val: Split, test: Split, record: TrialRecord) -> None:
    """Validation and test accuracy of the model's current weights, from its predictions."""
    for name, split in (("val", val), ("test", test)):
        predicted = predict(model, split)
        record.predictions[name] = encode_predictions(predicted)
        correct = int((predicted == split.labels.cpu().numpy()).sum())
        acc = correct / max(1, len(predicted))
        if name == "val":
            record.val_acc = acc
        else:
            record.test_acc = acc


def train_epoch(
    model: nn.Module,
    optimizer: torch.optim.Optimizer,
    train: Split,
    recipe: RecipeSpec,
    seed: int,
    progress: TrialProgress,
    steps: StepCount,
    should_stop: Callable[[], bool] | None,
) -> float:
    """One pass over the training subset (or up to the step budget); the mean train loss.

    An epoch stopped part-way (``progress.batch`` > 0) goes on after its done batches: they
    are rebuilt from (seed, epoch), so that the augmentation stream stays in step, and skipped.
    A non-finite loss marks the trial ``diverged`` and ends the epoch before that step's
    update. The loss sum stays a tensor, so the loop never waits for a value it only logs.

    Raises:
        TrialInterrupted: ``should_stop()`` became true; ``progress`` says how far the epoch got.
    """
    model.train()
    loss_sum, seen = torch.zeros((), device=train.images.device), 0
    if progress.batch:
        loss_sum, seen = progress.epoch_loss.to(train.images.device), progress.epoch_seen
    batches = train_batches(
        train.images, train.labels, recipe.batch_size, seed, progress.epoch, recipe.augment
    )
    for batch, (x, y) in enumerate(batches):
        if batch < progress.batch:
            continue
        if should_stop is not None and should_stop():
            progress.batch, progress.epoch_loss, progress.epoch_seen = batch, loss_sum, seen
            raise TrialInterrupted(f"stopped in epoch {shown_epoch(progress.epoch)}")
        if progress.step >= steps.total:
            break
        set_lr(optimizer, recipe, progress.step, steps)
        loss, finite = train_step(model, optimizer, x, y, recipe)
        if not finite:
            progress.record.status = "diverged"
            progress.record.note = f"loss was {float(loss.detach())} at step {progress.step}"
            break
        progress.step += 1
        loss_sum += loss.detach() * len(y)
        seen += len(y)
    progress.samples += seen
    progress.batch, progress.epoch_loss, progress.epoch_seen = 0, None, 0
    return float(loss_sum) / max(1, seen)


def trial_identity(
    blueprint: Layout | ModelVariant, recipe: RecipeSpec, data: PreparedData, seed: int
) -> str:
    """What a checkpoint must match to be resumed."""
    return f"variant={blueprint.variant} seed={seed} recipe={recipe!r} data={data.spec!r}"


def restore(
    path: Path | None, identity: str, model: nn.Module, optimizer: torch.optim.Optimizer
) -> TrialProgress | None:
    """Load the checkpoint into ``model`` and ``optimizer``; None when there is none to resume.

    A checkpoint that cannot be read, belongs to another trial or does not fit the model is
    set aside with a warning (train/checkpoint.py), and None is returned: start from epoch 0.
    """
    saved = read_or_set_aside(path) if path is not None else None
    if saved is None:
        return None
    problem = resume_problem(saved, identity, model.state_dict())
    if problem is not None:
        set_aside(path, *problem)
        return None
    model.load_state_dict(saved["model"])
    optimizer.load_state_dict(saved["optimizer"])
    torch.set_rng_state(saved["rng"])
    progress = TrialProgress(
        record=TrialRecord.from_dict(saved["record"]),
        epoch=saved["epoch"] + 1,
        step=saved["step"],
        samples=saved["samples"],
        eval_seconds=saved.get("eval_seconds", 0.0),
        best_state=saved["best_state"],
        batch=saved.get("batch", 0),
        epoch_loss=saved.get("epoch_loss"),
        epoch_seen=saved.get("epoch_seen", 0),
        epoch_seconds=saved.get("epoch_seconds", 0.0),
    )
    progress.record.note = f"resumed at epoch {shown_epoch(progress.epoch)}"
    if progress.batch:
        progress.record.note += f", {progress.batch} of its batches done"
    return progress


def checkpoint_state(
    identity: str, model: nn.Module, optimizer: torch.optim.Optimizer, progress: TrialProgress
) -> dict[str, Any]:
    """What `restore` reads back. The file stays after the trial ends:
    `kablate.results.checkpoint.scored_state` gives the weights the trial was scored with."""
    return {
        "identity": identity,
        "model": model.state_dict(),
        "optimizer": optimizer.state_dict(),
        "rng": torch.get_rng_state(),  # dropout draws from the global generator
        "best_state": progress.best_state,
        "epoch": progress.epoch - 1,  # the last finished epoch
        "step": progress.step,
        "samples": progress.samples,
        "eval_seconds": progress.eval_seconds,
        "record": progress.record.to_dict(),
        # Past that epoch (a stop part-way through the next): its batches done and their sums.
        "batch": progress.batch,
        "epoch_loss": progress.epoch_loss,
        "epoch_seen": progress.epoch_seen,
        "epoch_seconds": progress.epoch_seconds,
    }


def train_trial(
    blueprint: Layout | ModelVariant,
    recipe: RecipeSpec,
    data: PreparedData,
    seed: int,
    workdir: Path | None = None,
    threads: int = 1,
    device: str = "cpu",
    should_stop: Callable[[], bool] | None = None,
    judge: Callable[[int, float], bool] | None = None,
    checkpoint_seconds: float = 0.0,
) -> TrialRecord:
    """Train the variant ``blueprint`` builds, with ``seed``; checkpoint into ``workdir`` when
    one is due under ``checkpoint_seconds`` (`checkpoint.checkpoint_due`; 0: after every
    epoch), after the last epoch, and when ``should_stop()`` stops the trial.

    A NaN or inf loss, in training or validation, ends the trial with status ``diverged``
    (its curve is kept). ``judge`` (successive halving, `kablate.trials.halving`) is asked after
    every epoch, with the epochs done and the validation accuracy; when it answers True the
    trial ends with status ``stopped``: its score is that last validation accuracy, and nothing
    is scored on test and no predictions are kept (an early score is no evidence of the trained
    variant). It is asked before the epoch's checkpoint, so a trial killed in between asks again.

    Raises:
        TrialInterrupted: ``should_stop()`` became true; a checkpoint of the batches done is
            written first.
        DiskFullError: too little space left for the next checkpoint.
    """
    torch.set_num_threads(threads)
    dev = torch.device(device)
    train, val, test = (to_device(s, dev) for s in (data.train, data.val, data.test))
    stop = to_device(data.stop, dev) if data.stop is not None else None
    torch.manual_seed(seed)  # initialisation; data order and augmentation have their own
    model = build_network(blueprint).to(dev, memory_format=torch.channels_last)
    optimizer = make_optimizer(model, recipe)
    steps = step_count(recipe, len(train.labels))
    ckpt_path = workdir / CHECKPOINT if workdir is not None else None
    identity = trial_identity(blueprint, recipe, data, seed)
    progress = restore(ckpt_path, identity, model, optimizer)
    if progress is None:
        progress = TrialProgress(record=TrialRecord(threads=threads))
    record = progress.record
    clock = time.perf_counter() - record.train_seconds
    saved_at = time.perf_counter()  # of the last checkpoint (or the start of this process)

    def save() -> None:
        nonlocal saved_at
        record.steps = progress.step
        record.train_seconds = time.perf_counter() - clock
        if ckpt_path is not None:
            save_checkpoint(ckpt_path, checkpoint_state(identity, model, optimizer, progress))
        saved_at = time.perf_counter()

    # A checkpoint written as the judge stopped the trial resumes as stopped (no more epochs).
    while (
        record.status != "stopped"
        and progress.epoch < recipe.epochs
        and progress.step < steps.total
    ):
        epoch_start = time.perf_counter() - progress.epoch_seconds
        try:
            train_loss = train_epoch(
                model, optimizer, train, recipe, seed, progress, steps, should_stop
            )
        except TrialInterrupted:
            progress.epoch_seconds = time.perf_counter() - epoch_start
            save()  # the batches done so far: a resume skips them
            raise
        progress.epoch_seconds = 0.0
        if record.status == "diverged":
            break
        eval_start = time.perf_counter()
        val_loss, val_acc = evaluate(model, val)
        # The epoch is chosen on the early-stopping fold when there is one (never on val).
        chosen_acc = evaluate(model, stop)[1] if stop is not None else val_acc
        progress.eval_seconds += time.perf_counter() - eval_start
        seconds = time.perf_counter() - epoch_start
        record.curve.append(EpochRecord(progress.epoch, train_loss, val_loss, val_acc, seconds))
        if not math.isfinite(val_loss):  # the epoch's last update blew the weights up
            record.status = "diverged"
            record.note = (
                f"validation loss was {val_loss} after epoch {shown_epoch(progress.epoch)}"
            )
            break
        if not record.best_val_acc >= chosen_acc:  # also true while best is still NaN
            record.best_val_acc, record.best_epoch = chosen_acc, progress.epoch
            if recipe.test_from == "best":  # only then are these weights ever scored
                progress.best_state = {k: v.detach().clone() for k, v in model.state_dict().items()}
        if judge is not None and judge(progress.epoch + 1, val_acc):
            record.status = "stopped"
            record.note = f"stopped by successive halving after epoch {shown_epoch(progress.epoch)}"
        progress.epoch += 1
        last = (
            record.status == "stopped"
            or progress.epoch >= recipe.epochs
            or progress.step >= steps.total
        )
        if last or checkpoint_due(time.perf_counter() - saved_at, seconds, checkpoint_seconds):
            save()

    record.steps, record.threads = progress.step, threads
    record.train_seconds = time.perf_counter() - clock
    # Throughput of training proper: data handling, steps and checkpoints, not validation.
    busy = record.train_seconds - progress.eval_seconds
    record.samples_per_second = progress.samples / max(busy, 1e-9)
    if record.status == "diverged":
        return record
    if record.status == "stopped":  # the last validation score, and no evidence
        record.val_acc, record.score_epoch = record.curve[-1].val_acc, record.curve[-1].epoch
        return record
    if recipe.test_from == "best" and progress.best_state is not None:
        model.load_state_dict(progress.best_state)
        record.score_epoch = record.best_epoch
    else:
        record.score_epoch = record.curve[-1].epoch if record.curve else -1
    score(model, val, test, record)
    return record


def to_device(split: Split, device: torch.device) -> Split:
    """The split on ``device`` (images channels_last); the same object when already there."""
    if split.images.device == device:
        return split
    images = split.images.to(device, memory_format=torch.channels_last)
    return Split(images, split.labels.to(device), split.indices)
