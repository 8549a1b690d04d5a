"""Per-epoch checkpoints: written atomically, read with ``weights_only=True``."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import torch

from kablate.files import atomic_write


def save_checkpoint(path: Path, state: dict[str, Any]) -> None:
    """Write ``state`` to ``path`` so that a crash leaves either the old file or the new one."""
    atomic_write(path, lambda fh: torch.save(state, fh))


def load_checkpoint(path: Path) -> dict[str, Any] | None:
    """The saved state, or None when there is no checkpoint (or only a torn temp file)."""
    if not path.is_file():
        return None
    return torch.load(path, map_location="cpu", weights_only=True)
