"""Per-epoch checkpoints: written atomically, read with ``weights_only=True``."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Any

import torch


def save_checkpoint(path: Path, state: dict[str, Any]) -> None:
    """Write ``state`` to ``path`` so that a crash leaves either the old file or the new one."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=path.name, suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            torch.save(state, fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def load_checkpoint(path: Path) -> dict[str, Any] | None:
    """The saved state, or None when there is no checkpoint (or only a torn temp file)."""
    if not path.is_file():
        return None
    return torch.load(path, map_location="cpu", weights_only=True)
