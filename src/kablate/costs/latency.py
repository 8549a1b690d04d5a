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
- ONNX Runtime (the optional ``onnx`` extra, `kablate.nets.onnx_file`): each network is exported
  and run by an ``onnxruntime.InferenceSession`` on the CPU at the same threads, in the same
  rounds as torch (each round times every torch model and every session), summarised by the
  same statistic. Where the extra is missing, or a network does not export, the reason is
  recorded instead of a figure.
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
from kablate.nets.onnx_file import (
    export_onnx,
    onnx_missing,
    onnx_session,
    onnxruntime_version,
    run_session,
)

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
class RuntimeTiming:
    """ONNX Runtime's timings of one network at batch 1 and at the measured batch size."""

    batch1: Timing
    batch: Timing
    version: str  # onnxruntime's

    @property
    def noisy(self) -> bool:
        return self.batch1.noisy or self.batch.noisy


@dataclass(frozen=True)
class Latency:
    """One variant's inference latency at batch 1 and at ``batch_size``, and how it was taken."""

    batch1: Timing
    batch: Timing
    batch_size: int
    threads: int
    torch_version: str
    backends: tuple[tuple[str, str], ...] = ()  # (conv layer name, backend) at batch 1
    ort: RuntimeTiming | None = None  # ONNX Runtime's, in the same rounds
    ort_absent: str = ""  # why ``ort`` is None
    in_shape: tuple[int, ...] = ()  # C, H, W of the timed input

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


def ort_runners(models: list[torch.nn.Module], shapes: list[tuple], threads: int) -> list:
    """An ONNX Runtime session per model, as a callable on a numpy batch, or the reason there
    is none (the extra is missing; the model does not export)."""
    missing = onnx_missing()
    if missing:
        return [missing] * len(models)
    out: list = []
    for model, shape in zip(models, shapes, strict=True):
        try:
            session = onnx_session(export_onnx(model, shape), threads)
        except Exception as exc:  # the exporter raises many types; the reason is reported
            out.append(f"export to ONNX failed: {type(exc).__name__}: {str(exc).splitlines()[0]}")
            continue
        out.append(lambda x, s=session: run_session(s, x))
    return out


def _rounds(models: list, runners: list, inputs: list[torch.Tensor], rounds: int, warmup: int):
    """Torch's and ONNX Runtime's times in the same interleaved rounds: (torch's per model,
    ONNX Runtime's per runner that exists)."""
    pairs = [(r, x) for r, x in zip(runners, inputs, strict=True) if callable(r)]
    live = [r for r, _ in pairs]
    arrays = [np.ascontiguousarray(x.numpy()) for _, x in pairs]
    times = interleaved_times([*models, *live], [*inputs, *arrays], rounds, warmup)
    return times[: len(models)], iter(times[len(models) :])


def measure_layout_latencies(
    layouts: list[Layout | ModelVariant],
    batch_size: int,
    rounds: int = 30,
    warmup: int = 3,
    threads: int | None = None,
) -> list[Latency]:
    """Inference latency of every layout at batch 1 and at ``batch_size``, in eval mode,
    channels_last, timed in interleaved rounds (a quarter as many at ``batch_size``, at least
    5), under torch and, where the ``onnx`` extra is installed, ONNX Runtime. ``threads`` sets
    torch's intra-op threads (and ONNX Runtime's) for the measurement only; the count used is
    recorded, with the versions and each conv layer's torch backend at batch 1."""
    before = torch.get_num_threads()
    if threads:
        torch.set_num_threads(threads)
    try:
        used = torch.get_num_threads()
        models = [_prepare(layout) for layout in layouts]
        runners = ort_runners(models, [layout.in_shape for layout in layouts], used)
        ones, many = _inputs(layouts, 1), _inputs(layouts, batch_size)
        at_one, ort_one = _rounds(models, runners, ones, rounds, warmup)
        at_many, ort_many = _rounds(models, runners, many, max(5, rounds // 4), 1)
        version = onnxruntime_version() if any(callable(r) for r in runners) else ""
        out = []
        for i, layout in enumerate(layouts):
            names = _conv_names(layout, models[i])
            backends = conv_backends(models[i], ones[i])
            ort, absent = None, ""
            if callable(runners[i]):
                t1, tb = next(ort_one), next(ort_many)
                ort = RuntimeTiming(summarize_times(t1), summarize_times(tb), version)
            else:
                absent = runners[i]
            out.append(
                Latency(
                    summarize_times(at_one[i]),
                    summarize_times(at_many[i]),
                    batch_size,
                    used,
                    torch.__version__,
                    tuple(zip(names, backends, strict=True)),
                    ort,
                    absent,
                    tuple(layout.in_shape),
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
