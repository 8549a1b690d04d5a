"""Checkpoints: when to write one, written atomically, read with ``weights_only=True`` (results/).

A trial writes a checkpoint at the end of an epoch when waiting for the next epoch (predicted to
take as long as the last one) would leave more than ``every`` seconds of work unsaved
(`checkpoint_due`), always at its last epoch, and, mid-epoch, when it is asked to stop. So a kill
loses at most ``every`` seconds of work, or one epoch when an epoch takes longer; ``every = 0``
writes after every epoch. Writing after every short epoch would cost more than the work it saves.

A checkpoint that cannot be resumed (torn, garbage, or another trial's) is never deleted: it is
renamed ``checkpoint.pt.<why>-<n>`` beside the original, and the trial starts from epoch 0.
Before each write the free space is checked, so that a full disk stops the run cleanly
(`DiskFullError`) instead of failing the trial with a half-written file.
"""

from __future__ import annotations

import errno
import logging
import shutil
from pathlib import Path
from typing import Any

import torch

from kablate.errors import DiskFullError, is_disk_full
from kablate.results.checkpoint import load_checkpoint
from kablate.results.write import atomic_write

log = logging.getLogger("kablate")

DEFAULT_CHECKPOINT_SECONDS = 30.0  # `kablate run --checkpoint-seconds`'s default
SPACE_FACTOR = 2  # free space wanted per checkpoint: the new file is written beside the old one
UNREADABLE = "unreadable"
OTHER_TRIAL = "other-trial"


def checkpoint_due(unsaved: float, epoch_seconds: float, every: float) -> bool:
    """At an epoch's end, with ``unsaved`` seconds of work since the last checkpoint and an
    epoch of ``epoch_seconds``: whether to write one now (see the module docstring)."""
    return every == 0 or unsaved + epoch_seconds > every


def n_checkpoints(epochs: int, epoch_seconds: float, every: float) -> int:
    """How many checkpoints a trial of ``epochs`` epochs of ``epoch_seconds`` each writes:
    `checkpoint_due` replayed, plus the one at the last epoch."""
    n, unsaved = 0, 0.0
    for epoch in range(epochs):
        unsaved += epoch_seconds
        if epoch == epochs - 1 or checkpoint_due(unsaved, epoch_seconds, every):
            n, unsaved = n + 1, 0.0
    return n


def state_bytes(state: Any) -> int:
    """The bytes of the tensors in ``state`` (nested dicts and lists): a checkpoint's size."""
    if isinstance(state, torch.Tensor):
        return state.numel() * state.element_size()
    if isinstance(state, dict):
        return sum(state_bytes(v) for v in state.values())
    if isinstance(state, list | tuple):
        return sum(state_bytes(v) for v in state)
    return 0


def check_free_space(path: Path, state: dict[str, Any]) -> None:
    """Raise `DiskFullError` unless there is room for ``SPACE_FACTOR`` × the checkpoint."""
    size = path.stat().st_size if path.is_file() else state_bytes(state)
    free = shutil.disk_usage(path.parent).free
    if free < SPACE_FACTOR * size:
        raise DiskFullError(
            path, f"{free / 2**20:.1f} MiB free, a checkpoint needs about {size / 2**20:.1f} MiB"
        )


def save_checkpoint(path: Path, state: dict[str, Any]) -> None:
    """Write ``state`` to ``path`` so that a crash leaves either the old file or the new one.

    Raises:
        DiskFullError: too little free space, or none left while writing.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    check_free_space(path, state)
    try:
        atomic_write(path, lambda fh: torch.save(state, fh))
    except OSError as exc:
        if is_disk_full(exc):
            raise DiskFullError(path) from exc
        raise


def read_or_set_aside(path: Path) -> dict[str, Any] | None:
    """`load_checkpoint`, except that a file torch cannot read is set aside (None is returned).

    A refused permission or an I/O error is raised as it is: the file itself may be fine.
    """
    try:
        saved = load_checkpoint(path)
    except OSError as exc:
        if isinstance(exc, PermissionError) or exc.errno == errno.EIO:
            raise
        set_aside(path, UNREADABLE, one_line(exc))  # torch gives EINVAL for a cut zip
        return None
    except Exception as exc:  # torch raises RuntimeError, UnpicklingError, EOFError, ...
        set_aside(path, UNREADABLE, one_line(exc))
        return None
    if saved is not None and not isinstance(saved, dict):
        set_aside(path, UNREADABLE, f"it holds a {type(saved).__name__}, not a checkpoint")
        return None
    return saved


def one_line(exc: BaseException) -> str:
    """``Type: first line of the message``, at most 160 characters.

    torch's refusal to unpickle an object suggests ``weights_only=False``, which would run
    whatever the file holds; that advice is not passed on.
    """
    first = (str(exc).strip().splitlines() or [""])[0]
    if "weights only" in first.lower() or "weights_only" in first:
        first = "torch's safe loader refused what it holds"
    return f"{type(exc).__name__}: {first}"[:160]


RESUME_KEYS = ("identity", "model", "optimizer", "rng", "best_state", "epoch", "step", "samples")


def resume_problem(
    saved: dict[str, Any], identity: str, model_state: dict[str, torch.Tensor]
) -> tuple[str, str] | None:
    """Why ``saved`` cannot resume the trial ``identity`` of a model with ``model_state``:
    (``OTHER_TRIAL`` or ``UNREADABLE``, what is wrong), or None when it can."""
    missing = [key for key in RESUME_KEYS if key not in saved]
    if missing:
        return UNREADABLE, f"it lacks {', '.join(missing)}"
    if saved["identity"] != identity:
        return OTHER_TRIAL, f"it belongs to another trial: {saved['identity']}"
    weights = saved["model"]
    if not isinstance(weights, dict) or {k: tuple(v.shape) for k, v in weights.items()} != {
        k: tuple(v.shape) for k, v in model_state.items()
    }:
        return UNREADABLE, "its weights do not fit this variant"
    return None


def set_aside(path: Path, why: str, detail: str) -> Path:
    """Rename ``path`` to ``<name>.<why>-<n>`` (the first free n) and log a warning."""
    n = 1
    while (target := path.with_name(f"{path.name}.{why}-{n}")).exists():
        n += 1
    path.rename(target)
    log.warning(
        "%s cannot be resumed (%s): set aside as %s; the trial starts again from epoch 0",
        path,
        detail,
        target.name,
    )
    return target
