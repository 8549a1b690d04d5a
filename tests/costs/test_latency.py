"""Measured latency: the median and quartiles, interleaved rounds, the conditions recorded, and
each conv layer's backend."""

from __future__ import annotations

import statistics
from collections import Counter

import numpy as np
import pytest
import torch
from torch.profiler import ProfilerActivity, profile

from kablate.costs.latency import (
    NOISY_IQR_RATIO,
    Latency,
    Timing,
    conv_backends,
    crosses_backends,
    interleaved_times,
    measure_latency,
    summarize_times,
)
from kablate.nets.build import build_network
from tests.nets.tiny import tiny_layout


@pytest.mark.parametrize(
    ("times", "q1", "median", "q3"),
    [
        # Hand-worked, linear interpolation between order statistics at (n - 1)·p:
        # n = 5: positions 1, 2, 3 → 2, 3, 4 (the outlier 100 moves nothing).
        ([3.0, 1.0, 100.0, 2.0, 4.0], 2.0, 3.0, 4.0),
        # n = 4: positions 0.75, 1.5, 2.25 → 1 + 0.75, 2.5, 3 + 0.25.
        ([4.0, 1.0, 3.0, 2.0], 1.75, 2.5, 3.25),
    ],
)
def test_the_statistic_matches_a_hand_worked_example_and_numpy(times, q1, median, q3):
    t = summarize_times(times)
    assert (t.q1_ms, t.median_ms, t.q3_ms, t.n) == pytest.approx((q1, median, q3, len(times)))
    # the same figures from numpy.percentile and from the standard library's "inclusive"
    # quantiles (Hyndman & Fan 1996, definition 7)
    assert [t.q1_ms, t.median_ms, t.q3_ms] == pytest.approx(np.percentile(times, [25, 50, 75]))
    inclusive = statistics.quantiles(times, n=4, method="inclusive")
    assert [t.q1_ms, t.median_ms, t.q3_ms] == pytest.approx(inclusive)
    assert t.iqr_ms == pytest.approx(q3 - q1)


def test_a_timing_is_noisy_only_past_the_documented_threshold():
    quiet = Timing(median_ms=10.0, q1_ms=9.0, q3_ms=9.0 + 10.0 * NOISY_IQR_RATIO, n=30)
    loud = Timing(median_ms=10.0, q1_ms=9.0, q3_ms=9.01 + 10.0 * NOISY_IQR_RATIO, n=30)
    assert not quiet.noisy and loud.noisy
    assert loud.text().startswith("10 [9, ")


def test_rounds_time_every_model_once_each_in_a_rotating_order():
    calls: list[int] = []
    models = [lambda x, i=i: calls.append(i) for i in range(3)]
    times = interleaved_times(models, [None] * 3, rounds=4, warmup=1)
    assert [len(t) for t in times] == [4, 4, 4]
    rounds = [calls[i : i + 3] for i in range(0, len(calls), 3)]
    assert rounds == [[0, 1, 2], [1, 2, 0], [2, 0, 1], [0, 1, 2], [1, 2, 0]]


def test_latency_records_its_conditions_without_leaking_the_threads():
    before = torch.get_num_threads()
    lat = measure_latency(tiny_layout({}), batch_size=4, rounds=5, warmup=1, threads=1)
    assert lat.threads == 1 and lat.batch_size == 4 and lat.torch_version == torch.__version__
    assert lat.batch1.n == 5 and lat.batch.n == 5
    assert lat.batch1.q1_ms <= lat.batch1_ms <= lat.batch1.q3_ms and lat.batch_ms > 0
    assert [name for name, _ in lat.backends] == ["stem", "stage1.0", "stage2.0"]
    assert torch.get_num_threads() == before


# torch.profiler records which aten kernel ran each conv; each backend has its own kernel
# (aten/src/ATen/native/Convolution.cpp in the PyTorch sources dispatches them).
KERNEL_OF = {
    "Slow2d": "aten::_slow_conv2d_forward",
    "Mkldnn": "aten::mkldnn_convolution",
    "SlowDilated2d": "aten::slow_conv_dilated2d",
}


@pytest.mark.parametrize(
    "plan",
    [{}, {"stem": "5", "stage1": "3:depthwise"}, {"stem": "3d2", "stage2": "7"}],
)
def test_the_backends_are_the_kernels_the_profiler_sees_run(plan):
    layout = tiny_layout(plan)
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        model = build_network(layout).eval().to(memory_format=torch.channels_last)
        x = torch.randn(1, *layout.in_shape).contiguous(memory_format=torch.channels_last)
        backends = conv_backends(model, x)
        with torch.inference_mode(), profile(activities=[ProfilerActivity.CPU]) as prof:
            model(x)
    finally:
        torch.set_num_threads(before)
    n_convs = sum(layer.kind == "conv" for layer in layout.layers)
    assert len(backends) == n_convs
    ran = Counter(event.name for event in prof.events())
    expected = Counter(KERNEL_OF[b] for b in backends)
    assert {k: ran[k] for k in KERNEL_OF.values()} == {k: expected[k] for k in KERNEL_OF.values()}


def lat(*backends: str) -> Latency:
    t = Timing(1.0, 1.0, 1.0, 5)
    return Latency(t, t, 1, 1, "x", tuple((f"conv{i}", b) for i, b in enumerate(backends)))


def test_a_comparison_crosses_backends_when_either_side_uses_one_the_other_does_not():
    base = lat("Slow2d", "Slow2d", "Slow2d")
    assert not crosses_backends(lat("Slow2d"), base)  # fewer convs, same implementation
    assert crosses_backends(lat("Mkldnn", "Slow2d", "Slow2d"), base)
    assert crosses_backends(base, lat("Mkldnn", "Slow2d", "Slow2d"))
    assert crosses_backends(lat("unknown", "Slow2d", "Slow2d"), base)  # never silently equal
    assert lat("Slow2d", "Mkldnn", "Slow2d").backend_counts() == "Mkldnn×1, Slow2d×2"


def test_onnx_runtime_is_timed_in_the_same_rounds_where_installed():
    pytest.importorskip("onnxruntime")
    lat = measure_latency(tiny_layout({}), batch_size=4, rounds=6, warmup=1, threads=1)
    assert lat.ort is not None and lat.ort_absent == ""
    assert (lat.ort.batch1.n, lat.ort.batch.n) == (lat.batch1.n, lat.batch.n) == (6, 5)
    assert lat.ort.batch1.q1_ms <= lat.ort.batch1.median_ms <= lat.ort.batch1.q3_ms
    import onnxruntime

    assert lat.ort.version == onnxruntime.__version__


def test_without_the_extra_the_reason_is_recorded_instead_of_a_figure(monkeypatch):
    from kablate.costs import latency

    monkeypatch.setattr(latency, "onnx_missing", lambda: "onnxruntime not installed")
    lat = measure_latency(tiny_layout({}), batch_size=2, rounds=5, warmup=1, threads=1)
    assert lat.ort is None and lat.ort_absent == "onnxruntime not installed"
    assert lat.batch1.n == 5  # torch's figures are still taken


def test_a_network_that_does_not_export_keeps_its_torch_figures(monkeypatch):
    pytest.importorskip("onnxruntime")
    from kablate.costs import latency

    def refuse(model, shape):
        raise RuntimeError("unsupported operator\nmore detail")

    monkeypatch.setattr(latency, "export_onnx", refuse)
    lat = measure_latency(tiny_layout({}), batch_size=2, rounds=5, warmup=1, threads=1)
    assert lat.ort is None
    assert lat.ort_absent == "export to ONNX failed: RuntimeError: unsupported operator"
