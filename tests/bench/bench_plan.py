"""Benchmark: plan (expand, lay out, cost, filter) a 1,000-variant grid, then render it.

Target (issue: kernel plans and static costs): at most 5 s on a 2-core machine for planning.
The grid has 5 layer groups with 2 to 5 specs each (sizes 1 to 9 and all five forms):
5 × 4 × 5 × 5 × 2 = 1,000 distinct networks on a 32×32 RGB input.
Run: python tests/bench/bench_plan.py
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

from kablate.costs.catalog import build_catalog
from kablate.costs.plan_output import catalog_json, catalog_table
from kablate.spec import load_sweep

SWEEP = """
[sweep]
name = "bench-plan"

[data]
source = "cifar10"

[network]
kernel = "3"
[network.stem]
out_ch = 24
[[network.stages]]
out_ch = 32
n_convs = 2
[[network.stages]]
out_ch = 64
n_convs = 2
down = "maxpool"
[[network.stages]]
out_ch = 96
n_convs = 2
down = "maxpool"
[[network.stages]]
out_ch = 128
n_convs = 2
down = "maxpool"

[[grid]]
stem = ["3", "5", "7", "9", "5:stack"]
stage1 = ["3", "5", "5:stack", "3:depthwise"]
stage2 = ["3", "5", "5:split", "3:bottleneck/4", "3:depthwise"]
stage3 = ["3", "5", "3:depthwise", "1", "5:split"]
stage4 = ["3", "3:bottleneck/2"]
"""


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench-plan.toml"
        path.write_text(SWEEP)
        start = time.perf_counter()
        sweep = load_sweep(path)
        catalog = build_catalog(sweep)
        seconds = time.perf_counter() - start
    n = len(catalog.variants)
    start = time.perf_counter()
    text = catalog_json(catalog)
    json_seconds = time.perf_counter() - start
    start = time.perf_counter()
    catalog_table(catalog)
    table_seconds = time.perf_counter() - start
    print(
        f"planned {n} variants in {seconds:.2f} s ({seconds / n * 1000:.2f} ms each); "
        f"target ≤ 5 s for 1,000: ratio to target {seconds / 5.0:.2f}"
    )
    print(
        f"rendering: JSON ({len(text) / 1e6:.1f} MB) {json_seconds:.2f} s, "
        f"table {table_seconds:.2f} s; plan + JSON vs target: "
        f"{(seconds + json_seconds) / 5.0:.2f}"
    )


if __name__ == "__main__":
    main()
