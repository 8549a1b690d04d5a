"""`kablate plan` output: JSON fields, an independent recomputation from `layers`, the table."""

from __future__ import annotations

import csv
import io
import json
import re
from dataclasses import replace

import pytest

from kablate.costs.catalog import build_catalog
from kablate.costs.latency import NOISY_IQR_RATIO, Latency, RuntimeTiming, Timing
from kablate.costs.plan_output import NAME_WIDTH, catalog_csv, catalog_json, catalog_table
from kablate.spec import load_sweep
from tests.conftest import write_sweep
from tests.costs.recount import LAYER_FIELDS, VARIANT_FIELDS, recompute

SWEEP = """
[sweep]
name = "export"
seeds = [0, 1]

[network]
[network.stem]
out_ch = 8
[[network.stages]]
out_ch = 8
n_convs = 2
residual = true
[[network.stages]]
out_ch = 12
n_convs = 2
down = "stride"
residual = true
[[network.stages]]
out_ch = 12
n_convs = 1
down = "avgpool"

[[plan]]
name = "all-3"
body = "3"

[[grid]]
stem = ["4", "5x3", "3d2"]
body = ["3:stack", "7:stack", "5:split", "3:depthwise", "3:bottleneck/2", "2x4"]
"""


@pytest.fixture(scope="module")
def catalog(tmp_path_factory):
    path = write_sweep(tmp_path_factory.mktemp("export"), SWEEP, name="export")
    return build_catalog(load_sweep(path), in_shape=(1, 16, 16), n_classes=5)


@pytest.fixture(scope="module")
def variants(catalog):
    return json.loads(catalog_json(catalog))


def test_every_variant_has_the_documented_fields(variants):
    assert len(variants) == 1 + 18
    for v in variants:
        assert set(v) >= VARIANT_FIELDS
        assert v["latency_ms"] is None  # no --latency
        assert v["flops"] == 2 * v["macs"]
        for layer in v["layers"]:
            assert set(layer) >= LAYER_FIELDS
            assert layer["kind"] in {"conv", "pool", "global_pool", "linear"}
    assert variants[1]["plan"] == {"stem": "4", "body": "3:stack"}  # as written


def test_layers_are_in_forward_order_and_totals_are_their_sums(variants):
    for v in variants:
        layers = v["layers"]
        assert layers[0]["name"] == "stem" and [x["kind"] for x in layers[-2:]] == [
            "global_pool",
            "linear",
        ]
        for before, after in zip(layers, layers[1:], strict=False):
            assert after["in_ch"] == before["out_ch"]
            assert after["in_hw"] == before["out_hw"]
        assert v["params"] == sum(x["params"] for x in layers)
        assert v["macs"] == sum(x["macs"] for x in layers)


def test_an_independent_recomputation_from_layers_agrees(variants):
    for v in variants:
        again = recompute(v["layers"])
        assert again == {k: v[k] for k in ("params", "macs", "rf", "jump")}, v["name"]
        assert v["out_hw"] == v["layers"][-2]["in_hw"]


def test_the_table_fits_100_columns_is_sorted_by_cost_and_shows_rf(catalog):
    lines = catalog_table(catalog).splitlines()
    assert max(len(line) for line in lines) <= 100
    header = next(line for line in lines if line.startswith("variant"))
    assert header.split()[:6] == ["variant", "MACs", "xbase", "params", "rf", "jump"]
    names = {v.name for v in catalog.variants}
    # a name that is too long sits on its own line, its numbers on the next
    listed = [line.split()[0] for line in lines if line.split() and line.split()[0] in names]
    cheapest_first = sorted(catalog.variants, key=lambda v: (v.cost.macs, v.cost.params, v.name))
    assert listed == [v.name for v in cheapest_first]
    base_row = next(line for line in lines if line.startswith("all-3 "))
    assert f" {catalog.baseline.cost.rf:>4} " in base_row and "*" in base_row
    # the even stems are named in one warning, wrapped to the width
    table = "\n".join(lines)
    assert "warning: layer stem: the even 4×4 kernel" in table and "half a pixel" in table


def test_csv_has_a_row_per_variant(catalog):
    rows = list(csv.DictReader(io.StringIO(catalog_csv(catalog))))
    assert [r["name"] for r in rows] == [v.name for v in catalog.variants]
    assert rows[0]["plan"] == "body=3" and rows[0]["latency_ms"] == ""
    assert int(rows[0]["macs"]) == catalog.variants[0].cost.macs


def test_a_very_long_variant_name_still_fits(tmp_path):
    groups = ["stem", "stage1.0", "stage2.0", "conv1", "conv2"]
    body = "\n".join(f'"{g}" = ["3d2:depthwise"]' for g in groups)
    text = SWEEP.split("[[plan]]")[0] + "[[grid]]\n" + body + "\n"
    catalog = build_catalog(
        load_sweep(write_sweep(tmp_path, text, name="export")), in_shape=(1, 16, 16), n_classes=5
    )
    assert len(catalog.variants[0].name) > 100
    assert max(len(line) for line in catalog_table(catalog).splitlines()) <= 100


def with_latencies(catalog):
    """The catalog with made-up timings (demo data): the baseline quiet, on one backend; the
    first other variant noisy (IQR 40% of its median) and on two backends."""
    quiet, loud = Timing(1.0, 0.95, 1.05, 30), Timing(2.0, 1.6, 2.4, 30)
    for item in catalog.variants:
        base = item is catalog.baseline
        backends = (("stem", "Slow2d"),) if base else (("stem", "Mkldnn"), ("stage1.0", "Slow2d"))
        timing = quiet if base else loud
        item.latency = Latency(timing, timing, 16, 1, "2.x", backends)
    return catalog


def test_every_printed_latency_carries_its_spread_and_the_flags(tmp_path):
    path = write_sweep(tmp_path, SWEEP, name="export")
    catalog = with_latencies(build_catalog(load_sweep(path), in_shape=(1, 16, 16), n_classes=5))
    lines = catalog_table(catalog).splitlines()
    assert max(len(line) for line in lines) <= 100
    base_row = next(line for line in lines if line.startswith("all-3 ") and "[" in line)
    assert base_row.count("1 [0.95, 1.05]") == 2 and "Slow2d×1" in base_row
    assert "!" not in base_row and "≠" not in base_row
    rows = [line for line in lines if "Mkldnn×1, Slow2d×1" in line]
    assert len(rows) == len(catalog.variants) - 1
    assert all(r.count("2 [1.6, 2.4]") == 2 and " !≠ " in r for r in rows)
    # no bare millisecond figure: every number in a latency row sits in "m [q1, q3]"
    for row in [base_row, *rows]:
        timings = row[NAME_WIDTH + 1 : NAME_WIDTH + 41]
        figures = re.findall(r"[\d.]+ \[[\d.]+, [\d.]+\]", timings)
        assert len(figures) == 2 and len(re.findall(r"[\d.]+", timings)) == 6
    prose = " ".join(" ".join(lines).split())  # wrapped lines joined back
    assert f"! noisy: the interquartile range exceeds {NOISY_IQR_RATIO:.0%} of the median" in prose
    assert "run(s) some convs on other torch backends than the baseline all-3" in prose


def test_json_and_csv_keep_the_spread_the_conditions_and_the_backends(tmp_path):
    path = write_sweep(tmp_path, SWEEP, name="export")
    catalog = with_latencies(build_catalog(load_sweep(path), in_shape=(1, 16, 16), n_classes=5))
    base, other = json.loads(catalog_json(catalog))[:2]
    assert (base["latency_ms"], base["latency_q1_ms"], base["latency_q3_ms"]) == (1.0, 0.95, 1.05)
    assert base["latency_noisy"] is False and other["latency_noisy"] is True
    assert base["crosses_backends"] is False and other["crosses_backends"] is True
    assert other["conv_backends"] == {"stem": "Mkldnn", "stage1.0": "Slow2d"}
    assert (other["latency_threads"], other["latency_batch_size"]) == (1, 16)
    assert (other["latency_rounds"], other["latency_torch"]) == (30, "2.x")
    row = list(csv.DictReader(io.StringIO(catalog_csv(catalog))))[1]
    assert row["conv_backends"] == "stem=Mkldnn;stage1.0=Slow2d" and row["latency_q3_ms"] == "2.4"


def test_onnx_runtime_figures_sit_beside_torchs_or_the_table_says_why_not(tmp_path):
    path = write_sweep(tmp_path, SWEEP, name="export")
    catalog = with_latencies(build_catalog(load_sweep(path), in_shape=(1, 16, 16), n_classes=5))
    # demo timings: ONNX Runtime at half torch's median, for every variant but the last,
    # which "did not export"
    for item in catalog.variants[:-1]:
        half = Timing(item.latency.batch1_ms / 2, 0.46, 0.54, 30)
        item.latency = replace(item.latency, ort=RuntimeTiming(half, half, "1.x"))
    last = catalog.variants[-1]
    last.latency = replace(last.latency, ort_absent="export to ONNX failed: X")
    lines = catalog_table(catalog).splitlines()
    assert max(len(line) for line in lines) <= 100
    at = next(i for i, line in enumerate(lines) if line.startswith("ONNX Runtime 1.x latency"))
    base_row = next(line for line in lines[at:] if line.startswith("all-3 "))
    assert base_row.split() == ["all-3", "0.5", "[0.46,", "0.54]", "0.5", "[0.46,", "0.54]", "0.50"]
    assert f"not measured on ONNX Runtime: {last.name}: export to ONNX failed: X" in lines
    rows = json.loads(catalog_json(catalog))
    assert rows[0]["ort_latency_ms"] == 0.5 and rows[0]["onnxruntime_version"] == "1.x"
    assert rows[-1]["ort_latency_ms"] is None
    assert rows[-1]["ort_absent"] == "export to ONNX failed: X"
    table = list(csv.DictReader(io.StringIO(catalog_csv(catalog))))
    assert table[0]["ort_latency_q3_ms"] == "0.54" and table[-1]["ort_latency_ms"] == ""
    # without the extra: one line with the reason, no figures
    for item in catalog.variants:
        item.latency = replace(item.latency, ort=None, ort_absent="onnxruntime not installed")
    lines = catalog_table(catalog).splitlines()
    assert "ONNX Runtime latency: not measured: onnxruntime not installed" in lines
    assert not any(line.startswith("ONNX Runtime 1.x") for line in lines)


@pytest.mark.parametrize(
    ("value", "shown"),
    [
        (12_345_678, "12.3M"),
        (70_330, "70.3k"),
        (512, "512"),
        (90, "90"),
        (12.5, "12.5"),
        (0.34, "0.34"),  # a latency in ms: once shown as "0"
        (0.05, "0.05"),
        (2.5e9, "2.5G"),
    ],
)
def test_human_figures_keep_what_a_reader_needs_of_small_and_large_values(value, shown):
    from kablate.costs.plan_output import human

    assert human(value) == shown
