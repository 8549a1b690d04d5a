"""The torch device a trial trains on, checked before a run starts."""

from __future__ import annotations

import torch

from kablate.errors import UsageError

DEVICES = "cpu, or cuda / cuda:N when torch sees a CUDA device"


def check_device(name: str) -> torch.device:
    """The device ``name`` names, if a trial can train on it here.

    Raises:
        UsageError: not a device torch knows, one that cannot train (``meta``), or CUDA that
            this machine does not have.
    """
    try:
        device = torch.device(name)
    except (RuntimeError, TypeError, ValueError):
        raise UsageError(f"--device must be {DEVICES}, but got {name!r}") from None
    if device.type == "cpu":
        return device
    if device.type != "cuda":
        raise UsageError(f"--device must be {DEVICES}; {name!r} cannot train a network")
    if not torch.cuda.is_available():
        raise UsageError(
            f"--device {name} was asked for, but torch sees no CUDA device here; use --device cpu"
        )
    if device.index is not None and device.index >= torch.cuda.device_count():
        raise UsageError(
            f"--device {name}: torch sees only {torch.cuda.device_count()} CUDA device(s) "
            f"(cuda:0 to cuda:{torch.cuda.device_count() - 1})"
        )
    return device
