"""Checkpoints that cannot be resumed are set aside; a full disk stops before a torn write."""

from __future__ import annotations

import dataclasses
import errno
import io
import shutil
from collections import namedtuple

import pytest
import torch

import kablate.train.checkpoint as checkpoint
from kablate.costs.catalog import build_catalog
from kablate.data import prepare_data
from kablate.errors import DiskFullError
from kablate.results.paths import CHECKPOINT
from kablate.spec import load_sweep
from kablate.train import train_trial
from tests.train.loop_sweep import SWEEP


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    path = tmp_path_factory.mktemp("ckpt") / "loop.toml"
    path.write_text(SWEEP)
    sweep = load_sweep(path)
    layouts = {v.name: v.cost.layout for v in build_catalog(sweep).variants}
    return dataclasses.replace(sweep.recipe, epochs=2), prepare_data(sweep.data), layouts


@pytest.fixture(scope="module")
def fresh(tiny, tmp_path_factory):
    """The record of seed 0 of all-3 trained uninterrupted, and its final checkpoint's bytes."""
    recipe, data, layouts = tiny
    workdir = tmp_path_factory.mktemp("fresh")
    record = train_trial(layouts["all-3"], recipe, data, seed=0, workdir=workdir)
    return record, (workdir / CHECKPOINT).read_bytes()


def numbers(record) -> list:
    return [(e.epoch, e.train_loss, e.val_loss, e.val_acc) for e in record.curve] + [
        record.test_acc
    ]


class Foreign:
    """An object torch's safe loader refuses to unpickle."""


def torch_bytes(value, tmp_path) -> bytes:
    torch.save(value, tmp_path / "x.pt")
    return (tmp_path / "x.pt").read_bytes()


@pytest.mark.parametrize(
    "damage",
    [
        pytest.param(lambda good, tmp: good[: len(good) // 2], id="truncated"),
        pytest.param(lambda good, tmp: b"garbage, not a checkpoint\n" * 20, id="garbage"),
        pytest.param(lambda good, tmp: b"", id="empty"),
        pytest.param(lambda good, tmp: torch_bytes(torch.ones(3), tmp), id="a-bare-tensor"),
        pytest.param(lambda good, tmp: torch_bytes({"epoch": 1}, tmp), id="foreign-dict"),
        pytest.param(lambda good, tmp: torch_bytes({"x": Foreign()}, tmp), id="foreign-object"),
    ],
)
def test_an_unreadable_checkpoint_is_set_aside_and_the_trial_trains_from_epoch_0(
    tiny, fresh, tmp_path, damage, caplog
):
    recipe, data, layouts = tiny
    workdir = tmp_path / "trial"
    workdir.mkdir()
    bad = damage(fresh[1], tmp_path)
    (workdir / CHECKPOINT).write_bytes(bad)
    with caplog.at_level("WARNING", logger="kablate"):
        record = train_trial(layouts["all-3"], recipe, data, seed=0, workdir=workdir)
    assert numbers(record) == numbers(fresh[0])
    assert "resumed" not in record.note
    aside = workdir / f"{CHECKPOINT}.unreadable-1"
    assert aside.read_bytes() == bad
    assert str(workdir / CHECKPOINT) in caplog.text and aside.name in caplog.text
    assert "weights_only" not in caplog.text  # no advice to load what the safe loader refused
    assert torch.load(workdir / CHECKPOINT, weights_only=True)["epoch"] == recipe.epochs - 1


def test_a_checkpoint_of_another_trial_or_variant_is_set_aside(tiny, fresh, tmp_path, caplog):
    recipe, data, layouts = tiny
    workdir = tmp_path / "trial"
    workdir.mkdir()
    (workdir / CHECKPOINT).write_bytes(fresh[1])  # seed 0's checkpoint, in seed 1's folder
    with caplog.at_level("WARNING", logger="kablate"):
        record = train_trial(layouts["all-3"], recipe, data, seed=1, workdir=workdir)
    assert (workdir / f"{CHECKPOINT}.other-trial-1").read_bytes() == fresh[1]
    assert "belongs to another trial" in caplog.text
    assert numbers(record) == numbers(train_trial(layouts["all-3"], recipe, data, seed=1))


def test_weights_that_do_not_fit_the_variant_are_set_aside(tiny, fresh, tmp_path):
    recipe, data, layouts = tiny
    saved = torch.load(io.BytesIO(fresh[1]), weights_only=True)
    saved["model"] = {k: v.reshape(-1)[:1] for k, v in saved["model"].items()}  # wrong shapes
    workdir = tmp_path / "trial"
    workdir.mkdir()
    torch.save(saved, workdir / CHECKPOINT)
    record = train_trial(layouts["all-3"], recipe, data, seed=0, workdir=workdir)
    assert numbers(record) == numbers(fresh[0])
    assert (workdir / f"{CHECKPOINT}.unreadable-1").is_file()


def test_a_second_unreadable_checkpoint_does_not_overwrite_the_first_one_set_aside(tmp_path):
    path = tmp_path / CHECKPOINT
    for n in (1, 2):
        path.write_bytes(b"bad %d" % n)
        assert checkpoint.read_or_set_aside(path) is None
    assert (tmp_path / f"{CHECKPOINT}.unreadable-1").read_bytes() == b"bad 1"
    assert (tmp_path / f"{CHECKPOINT}.unreadable-2").read_bytes() == b"bad 2"


Usage = namedtuple("Usage", "total used free")


def test_too_little_free_space_stops_before_writing_and_keeps_the_last_checkpoint(
    tmp_path, monkeypatch
):
    path = tmp_path / CHECKPOINT
    state = {"epoch": 1, "w": torch.ones(1000)}  # 4,000 bytes of tensors
    checkpoint.save_checkpoint(path, state)
    before = path.read_bytes()
    size = len(before)
    monkeypatch.setattr(shutil, "disk_usage", lambda p: Usage(10**9, 0, 2 * size - 1))
    with pytest.raises(DiskFullError, match=f"disk full at {path}.*MiB free"):
        checkpoint.save_checkpoint(path, {"epoch": 2, "w": torch.ones(1000)})
    assert path.read_bytes() == before
    monkeypatch.setattr(shutil, "disk_usage", lambda p: Usage(10**9, 0, 2 * size))
    checkpoint.save_checkpoint(path, {"epoch": 2, "w": torch.ones(1000)})
    assert torch.load(path, weights_only=True)["epoch"] == 2


def test_the_first_checkpoint_is_sized_from_its_tensors(tmp_path, monkeypatch):
    monkeypatch.setattr(shutil, "disk_usage", lambda p: Usage(10**9, 0, 7_999))
    with pytest.raises(DiskFullError):
        checkpoint.save_checkpoint(tmp_path / CHECKPOINT, {"w": torch.ones(1000)})
    assert not list(tmp_path.iterdir())


def test_a_full_disk_while_writing_raises_disk_full_and_leaves_the_last_checkpoint(
    tmp_path, monkeypatch
):
    path = tmp_path / CHECKPOINT
    checkpoint.save_checkpoint(path, {"epoch": 1})

    def full(state, fh):
        fh.write(b"half a checkpoint")
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(torch, "save", full)
    with pytest.raises(DiskFullError, match=f"disk full at {path}"):
        checkpoint.save_checkpoint(path, {"epoch": 2})
    monkeypatch.undo()
    assert checkpoint.load_checkpoint(path)["epoch"] == 1
    assert [p.name for p in tmp_path.iterdir()] == [CHECKPOINT]


@pytest.mark.parametrize(
    ("epochs", "epoch_seconds", "every", "expected"),
    [
        # 4 s epochs under 10 s: after epochs 1, 3, 5, 7 and the last (9); 8 s lost at most.
        (10, 4.0, 10.0, 5),
        (10, 4.0, 0.0, 10),  # 0: every epoch
        (10, 20.0, 10.0, 10),  # an epoch longer than the limit: every epoch
        (10, 4.0, 1000.0, 1),  # only the last
        (1, 4.0, 1000.0, 1),
    ],
)
def test_the_checkpoints_a_trial_writes_by_time(epochs, epoch_seconds, every, expected):
    assert checkpoint.n_checkpoints(epochs, epoch_seconds, every) == expected


def test_a_checkpoint_is_due_before_the_next_epoch_would_overrun_the_limit():
    assert not checkpoint.checkpoint_due(5.0, 4.0, 10.0)  # 9 s unsaved after the next: wait
    assert checkpoint.checkpoint_due(7.0, 4.0, 10.0)  # 11 s after the next: write now
    assert checkpoint.checkpoint_due(0.1, 0.1, 0.0)
