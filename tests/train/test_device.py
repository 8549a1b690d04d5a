"""The device check before a run: cpu trains, names torch does not know or that cannot train
are refused, and CUDA is refused where torch sees none or fewer devices (torch.cuda is
monkeypatched: the suite needs no GPU)."""

from __future__ import annotations

import pytest
import torch

from kablate.errors import UsageError
from kablate.train.device import check_device


def test_the_cpu_trains():
    assert check_device("cpu") == torch.device("cpu")


@pytest.mark.parametrize(
    ("name", "message"),
    [("bogus", "but got 'bogus'"), ("meta", "'meta' cannot train a network")],
)
def test_a_device_that_cannot_train_is_refused(name, message):
    with pytest.raises(UsageError, match=message):
        check_device(name)


def test_cuda_is_refused_where_torch_sees_none(monkeypatch):
    monkeypatch.setattr(torch.cuda, "is_available", lambda: False)
    with pytest.raises(UsageError, match="torch sees no CUDA device here; use --device cpu"):
        check_device("cuda")


def test_a_cuda_index_beyond_the_devices_is_refused_naming_the_range(monkeypatch):
    monkeypatch.setattr(torch.cuda, "is_available", lambda: True)
    monkeypatch.setattr(torch.cuda, "device_count", lambda: 2)
    assert check_device("cuda:1") == torch.device("cuda", 1)
    with pytest.raises(UsageError, match=r"only 2 CUDA device\(s\) \(cuda:0 to cuda:1\)"):
        check_device("cuda:2")
