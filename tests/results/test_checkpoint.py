"""Reading checkpoints back: the scored weights are the chosen epoch's when one was kept, else
the last epoch's; a missing, torn or foreign checkpoint is skipped; and a checkpoint is loaded
with torch.load(weights_only=True), which refuses a pickled object (torch's documentation of
``weights_only``)."""

from __future__ import annotations

import pickle

import pytest
import torch

from kablate.results.checkpoint import load_checkpoint, scored_states
from kablate.results.paths import checkpoint_path


def save(results, variant_id: str, seed: int, value) -> None:
    path = checkpoint_path(results, f"{variant_id}-s{seed}")
    path.parent.mkdir(parents=True)
    torch.save(value, path)


def test_the_scored_weights_are_the_chosen_epochs_else_the_last_epochs(tmp_path):
    last, best = {"w": torch.ones(2)}, {"w": torch.zeros(2)}
    save(tmp_path, "v0", 0, {"model": last, "best_state": best})
    save(tmp_path, "v0", 1, {"model": last, "best_state": None})
    states = scored_states(tmp_path, "v0", [0, 1, 2])  # seed 2 has no checkpoint
    assert set(states) == {0, 1}
    assert torch.equal(states[0]["w"], best["w"]) and torch.equal(states[1]["w"], last["w"])


def test_a_torn_or_foreign_checkpoint_is_skipped_and_the_others_still_count(tmp_path):
    save(tmp_path, "v0", 0, {"model": {"w": torch.ones(1)}, "best_state": None})
    torn = checkpoint_path(tmp_path, "v0-s1")
    torn.parent.mkdir(parents=True)
    torn.write_bytes(b"PK\x03\x04 not a whole file")
    save(tmp_path, "v0", 2, {"something": "else"})
    assert set(scored_states(tmp_path, "v0", [0, 1, 2])) == {0}
    assert load_checkpoint(tmp_path / "nothing.pt") is None


class Payload:
    """An arbitrary object: weights_only loading must refuse to unpickle it."""


def test_a_checkpoint_that_holds_an_object_is_refused(tmp_path):
    path = tmp_path / "evil.pt"
    torch.save({"model": Payload()}, path)
    with pytest.raises(pickle.UnpicklingError):
        load_checkpoint(path)
