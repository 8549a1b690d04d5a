"""Reading a trial's checkpoint back: for resuming it, and for the weights it was scored with.

A checkpoint lives at `paths.checkpoint_path` (``trials/<job key>/checkpoint.pt``). The trainer
writes it by time and at the trial's end (`kablate.train.checkpoint`; its state is
`kablate.train.loop.checkpoint_state`, written through `write.atomic_write`) and keeps it when
the trial ends. It is a dict of tensors and plain values, loaded with
``weights_only=True`` so that a file never runs code. Its keys ``model`` (the last epoch's
weights) and ``best_state`` (the chosen epoch's, kept only with ``test_from = "best"``) give the
scored weights.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import torch

from kablate.lifecycle import JobKey
from kablate.results.paths import checkpoint_path


def load_checkpoint(path: Path) -> dict[str, Any] | None:
    """The saved state, or None when there is no checkpoint (or only a torn temp file)."""
    if not path.is_file():
        return None
    return torch.load(path, map_location="cpu", weights_only=True)


def scored_state(saved: dict[str, Any]) -> dict[str, torch.Tensor]:
    """The weights a finished trial's checkpoint was scored with: the chosen epoch's when it
    kept one (``test_from = "best"``), else the last epoch's."""
    return saved["best_state"] or saved["model"]


def scored_states(results_dir: Path, variant_id: str, seeds: list[int]) -> dict[int, dict]:
    """seed → the scored weights of each given (finished) trial whose checkpoint exists."""
    out = {}
    for seed in seeds:
        try:
            saved = load_checkpoint(checkpoint_path(results_dir, JobKey(variant_id, seed)))
        except Exception:  # a torn or foreign file: skip it, the others still count
            continue
        if isinstance(saved, dict) and (saved.get("best_state") or saved.get("model")):
            out[seed] = scored_state(saved)
    return out
