"""Measured CPU latency of a built network: median of repeats, threads recorded."""

from __future__ import annotations

import statistics
import time
from dataclasses import dataclass

import torch

from kablate.nets.build import build_network
from kablate.nets.layout import Layout


@dataclass(frozen=True)
class Latency:
    batch1_ms: float
    batch_ms: float
    batch_size: int
    threads: int
    repeats: int  # timed passes at batch 1
    batch_repeats: int = 5  # timed passes at ``batch_size``


def _median_ms(model: torch.nn.Module, x: torch.Tensor, repeats: int, warmup: int) -> float:
    with torch.inference_mode():
        for _ in range(warmup):
            model(x)
        times = []
        for _ in range(repeats):
            start = time.perf_counter()
            model(x)
            times.append((time.perf_counter() - start) * 1000.0)
    return statistics.median(times)


def measure_latency(
    layout: Layout, batch_size: int, repeats: int = 20, warmup: int = 3, threads: int | None = None
) -> Latency:
    """Inference latency at batch 1 and at ``batch_size``, in eval mode, channels_last.

    Each figure is the median of ``repeats`` timed forward passes after ``warmup`` untimed
    ones (at the training batch size, a quarter as many, at least 5). ``threads`` sets
    torch's intra-op threads for the measurement only; the count used is recorded.
    """
    before = torch.get_num_threads()
    if threads:
        torch.set_num_threads(threads)
    try:
        torch.manual_seed(0)
        model = build_network(layout).eval().to(memory_format=torch.channels_last)
        c, h, w = layout.in_shape
        one = torch.randn(1, c, h, w).contiguous(memory_format=torch.channels_last)
        many = torch.randn(batch_size, c, h, w).contiguous(memory_format=torch.channels_last)
        batch_repeats = max(5, repeats // 4)
        return Latency(
            batch1_ms=_median_ms(model, one, repeats, warmup),
            batch_ms=_median_ms(model, many, batch_repeats, 1),
            batch_size=batch_size,
            threads=torch.get_num_threads(),
            repeats=repeats,
            batch_repeats=batch_repeats,
        )
    finally:
        torch.set_num_threads(before)
