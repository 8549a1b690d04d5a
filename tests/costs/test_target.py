"""The `[target]` table: latency and inference memory are measured at its threads, batch,
input size and runtime."""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from kablate.cli import main
from kablate.costs import catalog as catalog_module
from kablate.costs.catalog import build_catalog, measure_latencies
from kablate.costs.memory import inference_peak_bytes
from kablate.errors import SweepError, UsageError
from kablate.nets.build import build_network
from kablate.spec import load_sweep
from tests.conftest import TINY_SWEEP, write_sweep

TARGET = '\n[target]\nthreads = 1\nbatch = 3\ninput = [20, 12]\nruntime = "torch"\n'


def test_the_target_table_is_read_and_checked(tmp_path):
    sweep = load_sweep(write_sweep(tmp_path, TINY_SWEEP + TARGET))
    t = sweep.target
    assert (t.threads, t.batch, t.input, t.runtime) == (1, 3, (20, 12), "torch")
    assert load_sweep(write_sweep(tmp_path, TINY_SWEEP)).target.input == ()
    for bad, key in (
        ("input = [16]", "target.input"),
        ("input = [0, 16]", "target.input"),
        ('runtime = "tflite"', "target.runtime"),
        ("threads = -1", "target.threads"),
        ("thread = 2", "target.thread"),
    ):
        with pytest.raises(SweepError, match=key.replace(".", r"\.")):
            load_sweep(write_sweep(tmp_path, TINY_SWEEP + f"\n[target]\n{bad}\n"))


def test_latency_and_inference_memory_are_measured_on_the_target(tmp_path):
    sweep = load_sweep(write_sweep(tmp_path, TINY_SWEEP + TARGET))
    catalog = build_catalog(sweep, in_shape=(1, 8, 8), n_classes=10)
    measure_latencies(catalog)
    for item in catalog.variants:
        lat = item.latency
        assert (lat.threads, lat.batch_size, lat.in_shape) == (1, 3, (1, 20, 12))
        # the inference peak of the same variant laid out at 20×12, not at the data's 8×8
        at_target = catalog_module.at_target_input(catalog, item)
        assert at_target.in_shape == (1, 20, 12)
        expected = inference_peak_bytes(build_network(at_target), (1, 20, 12))
        assert item.infer_mem_bytes == expected
        assert expected > inference_peak_bytes(build_network(item.blueprint), (1, 8, 8))
    # --threads (plan) overrides the target's threads
    measure_latencies(catalog, threads=2)
    assert catalog.variants[0].latency.threads == 2


def test_an_onnxruntime_target_without_the_extra_is_refused(tmp_path, monkeypatch):
    body = TINY_SWEEP + '\n[target]\nruntime = "onnxruntime"\n'
    catalog = build_catalog(load_sweep(write_sweep(tmp_path, body)), (1, 8, 8), 10)
    monkeypatch.setattr(catalog_module, "onnx_missing", lambda: "onnxruntime not installed")
    with pytest.raises(UsageError, match='target.runtime = "onnxruntime" needs ONNX Runtime'):
        measure_latencies(catalog)


def test_plan_latency_reports_the_target(tmp_path):
    path = write_sweep(tmp_path, TINY_SWEEP + TARGET)
    out = CliRunner().invoke(main, ["plan", str(path), "--latency", "--format", "json"])
    assert out.exit_code == 0, out.output
    rows = json.loads(out.output)
    assert all(r["latency_input"][1:] == [20, 12] and r["latency_batch_size"] == 3 for r in rows)
    assert all(r["latency_threads"] == 1 and r["infer_mem_bytes"] > 0 for r in rows)
