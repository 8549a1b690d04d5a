"""Shared fixtures of the report tests."""

from __future__ import annotations

import pytest

from kablate.report.card import CardContext
from kablate.results.data_record import DataRecord


@pytest.fixture
def card_context() -> CardContext:
    """A results folder's sweep.json and data.json, as the card reads them (invented)."""
    meta = {
        "name": "synthetic",
        "source": "sweeps/synthetic.toml",
        "fingerprint": "abc",
        "seeds": [0, 1, 2],
        "resolved": {"recipe": {"epochs": 4}},
        "command": "kablate run x",
        "environment": {"cpu": "a CPU", "cores": 2, "packages": {"torch": "2"}},
        "workers": 1,
        "threads": 2,
        "storage": "study.journal",
    }
    data = {
        "source": "digits",
        "sizes": {"train": 10, "val": 5, "test": 5},
        "in_shape": [1, 8, 8],
        "n_classes": 10,
        "test_pool": "held out",
        "mean": [0.5],
        "std": [0.25],
        "indices_sha1": {"train": "t", "val": "v", "test": "s"},
        "indices": {"train": list(range(10)), "val": list(range(5)), "test": list(range(5))},
    }
    return CardContext(meta, DataRecord.from_dict(data, "data.json"), "0", ("a.png",), "MACs")
