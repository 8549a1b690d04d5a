"""Measured CPU latency of built networks: interleaved rounds, a median with its spread, and
the conditions it was measured under.

Read in this order:
- `Timing` and `summarize_times`: the statistic. The median of the timed passes, with the
  interquartile range (25th and 75th percentiles, linear interpolation as in
  ``numpy.percentile``'s default) as its spread. A timing is *noisy* when its IQR exceeds
  `NOISY_IQR_RATIO` of its median (the threshold is ours; sweeps/README.md explains it).
- `measure_layout_latencies`: every network is timed in the same rounds, one pass each per round, in
  an order that rotates from round to round, so that drift of the machine (another process,
  frequency scaling, thermal throttling) hits every variant alike instead of the ones timed
  last.
- `conv_backends`: which of torch's convolution implementations each conv layer runs on, as
  ``torch._C._select_conv_backend`` reports it for the measured input (a private torch
  function: where it is missing, the backend reads "unknown"). torch routes convs by kernel
  size, groups and dilation (dense 3×3 to one native path, 5×5 and depthwise to oneDNN,
  dilated to another native path on torch 2.14), so a latency comparison between two plans
  whose convs run on different backends compares implementations too: `crosses_backends` says
  so.
"""

from __future__ import annotations

import time
from collections import Counter
from dataclasses import dataclass

import numpy as np
import torch

from kablate.nets.build import build_network
from kablate.nets.layout import Layout
from kablate.nets.model_variant import ModelVariant

# A timing whose interquartile range exceeds this share of its median is flagged noisy.
NOISY_IQR_RATIO = 0.2
UNKNOWN_BACKEND = "unknown"


@dataclass(frozen=True)
class Timing:
    """The timed passes of one network at one batch size, summarised."""

    median_ms: float
    q1_ms: float  # 25th percentile
    q3_ms: float  # 75th percentile
    n: int  # timed passes

    @property
    def iqr_ms(self) -> float:
        return self.q3_ms - self.q1_ms

    @property
    def noisy(self) -> bool:
        return self.iqr_ms > NOISY_IQR_RATIO * self.median_ms

    def text(self) -> str:
        """'0.48 ms [0.45, 0.52]': the median with its interquartile range."""
        return f"{self.median_ms:.3g} [{self.q1_ms:.3g}, {self.q3_ms:.3g}]"


def summarize_times(times_ms: list[float]) -> Timing:
    """Median and quartiles of ``times_ms`` (``numpy.percentile``, linear interpolation)."""
    if not times_ms:
        raise ValueError("no timed passes to summarise")
    q1, median, q3 = np.percentile(np.asarray(times_ms, dtype=float), [25, 50, 75])
    return Timing(float(median), float(q1), float(q3), len(times_ms))


@dataclass(frozen=True)
class Latency:
    """One variant's inference latency at batch 1 and at ``batch_size``, and how it was taken."""

    batch1: Timing
    batch: Timing
    batch_size: int
    threads: int
    torch_version: str
    backends: tuple[tuple[str, str], ...] = ()  # (conv layer name, backend) at batch 1

    @property
    def batch1_ms(self) -> float:
        return self.batch1.median_ms

    @property
    def batch_ms(self) -> float:
        return self.batch.median_ms

    @property
    def noisy(self) -> bool:
        return self.batch1.noisy or self.batch.noisy

    def backend_counts(self) -> str:
        """'Mkldnn×2, Slow2d×4': how many conv layers run on each backend."""
        counts = Counter(backend for _, backend in self.backends)
        return ", ".join(f"{b}×{n}" for b, n in sorted(counts.items())) or "-"


def crosses_backends(a: Latency, b: Latency) -> bool:
    """Whether the two networks' convs run on different sets of torch backends."""
    return {x for _, x in a.backends} != {x for _, x in b.backends}


def conv_backends(model: torch.nn.Module, x: torch.Tensor) -> list[str]:
    """The backend torch selects for each ``Conv2d`` of ``model`` (in module order) on input
    ``x``, found by one forward pass with hooks that ask ``torch._C._select_conv_backend``."""
    select = getattr(torch._C, "_select_conv_backend", None)
    found: list[str] = []

    def ask(conv: torch.nn.Conv2d, args: tuple) -> None:
        try:
            backend = select(
                args[0],
                conv.weight,
                conv.bias,
                list(conv.stride),
                list(conv.padding),
                list(conv.dilation),
                False,  # transposed
                [0, 0],  # output padding
                conv.groups,
                None,  # bias sizes
            )
            found.append(getattr(backend, "name", str(backend)))
        except (TypeError, RuntimeError):  # a torch whose private signature differs
            found.append(UNKNOWN_BACKEND)

    convs = [m for m in model.modules() if isinstance(m, torch.nn.Conv2d)]
    if select is None:
        return [UNKNOWN_BACKEND] * len(convs)
    hooks = [m.register_forward_pre_hook(ask) for m in convs]
    try:
        with torch.inference_mode():
            model(x)
    finally:
        for hook in hooks:
            hook.remove()
    return found


def _prepare(layout: Layout) -> torch.nn.Module:
    torch.manual_seed(0)
    return build_network(layout).eval().to(memory_format=torch.channels_last)


def _inputs(layouts: list[Layout], batch: int) -> list[torch.Tensor]:
    """An input batch per layout; layouts of the same input shape share one (a sweep's do)."""
    made: dict[tuple[int, int, int], torch.Tensor] = {}
    for layout in layouts:
        if layout.in_shape not in made:
            x = torch.randn(batch, *layout.in_shape)
            made[layout.in_shape] = x.contiguous(memory_format=torch.channels_last)
    return [made[layout.in_shape] for layout in layouts]


def interleaved_times(
    models: list[torch.nn.Module], inputs: list[torch.Tensor], rounds: int, warmup: int
) -> list[list[float]]:
    """Milliseconds of ``rounds`` timed passes per model; each round times every model once,
    starting one model later than the round before (untimed ``warmup`` rounds first)."""
    n = len(models)
    times: list[list[float]] = [[] for _ in models]
    with torch.inference_mode():
        for r in range(warmup + rounds):
            for i in range(n):
                k = (i + r) % n
                start = time.perf_counter()
                models[k](inputs[k])
                elapsed = (time.perf_counter() - start) * 1000.0
                if r >= warmup:
                    times[k].append(elapsed)
    return times


def _conv_names(blueprint: Layout | ModelVariant, model: torch.nn.Module) -> list[str]:
    """Each conv's name, in module order: its layer name in kablate's own layout, its module
    path in the user's model."""
    if isinstance(blueprint, Layout):
        return [layer.name for layer in blueprint.layers if layer.kind == "conv"]
    return [name for name, m in model.named_modules() if isinstance(m, torch.nn.Conv2d)]


def measure_layout_latencies(
    layouts: list[Layout | ModelVariant],
    batch_size: int,
    rounds: int = 30,
    warmup: int = 3,
    threads: int | None = None,
) -> list[Latency]:
    """Inference latency of every layout at batch 1 and at ``batch_size``, in eval mode,
    channels_last, timed in interleaved rounds (a quarter as many at ``batch_size``, at least
    5). ``threads`` sets torch's intra-op threads for the measurement only; the count used is
    recorded, with torch's version and each conv layer's backend at batch 1."""
    before = torch.get_num_threads()
    if threads:
        torch.set_num_threads(threads)
    try:
        models = [_prepare(layout) for layout in layouts]
        ones, many = _inputs(layouts, 1), _inputs(layouts, batch_size)
        batch_rounds = max(5, rounds // 4)
        at_one = interleaved_times(models, ones, rounds, warmup)
        at_many = interleaved_times(models, many, batch_rounds, 1)
        used = torch.get_num_threads()
        out = []
        for layout, model, one, t1, tb in zip(layouts, models, ones, at_one, at_many, strict=True):
            names = _conv_names(layout, model)
            backends = conv_backends(model, one)
            out.append(
                Latency(
                    summarize_times(t1),
                    summarize_times(tb),
                    batch_size,
                    used,
                    torch.__version__,
                    tuple(zip(names, backends, strict=True)),
                )
            )
        return out
    finally:
        torch.set_num_threads(before)


def measure_latency(
    layout: Layout, batch_size: int, rounds: int = 30, warmup: int = 3, threads: int | None = None
) -> Latency:
    """`measure_layout_latencies` of one layout."""
    return measure_layout_latencies([layout], batch_size, rounds, warmup, threads)[0]
