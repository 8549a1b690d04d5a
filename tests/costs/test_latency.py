"""Measured latency: batch 1 and the training batch size, median of repeats, threads kept."""

from __future__ import annotations

import torch

from kablate.costs.latency import measure_latency
from tests.nets.tiny import tiny_layout


def test_latency_records_both_batches_and_the_threads_without_leaking_them():
    before = torch.get_num_threads()
    lat = measure_latency(tiny_layout({}), batch_size=4, repeats=3, warmup=1, threads=1)
    assert lat.threads == 1 and lat.batch_size == 4 and lat.repeats == 3
    assert lat.batch1_ms > 0 and lat.batch_ms > 0
    assert torch.get_num_threads() == before
