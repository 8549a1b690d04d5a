"""Benchmark: plan (expand, lay out, cost) a 1,000-variant grid.

Target (issue: kernel plans and static costs): at most 5 s on a 2-core machine.
Run: python tests/bench/bench_plan.py
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

from kablate.costs.catalog import build_catalog
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
stem = ["3", "5", "7", "9", "3:stack"]
stage1 = ["3", "5", "5:stack", "3:depthwise"]
stage2 = ["3", "5", "5:split", "3:bottleneck/4", "3:depthwise"]
stage3 = ["3", "5", "3:depthwise", "1", "5:split"]
stage4 = ["3", "3:bottleneck/2"]
"""


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench-plan.toml"
        path.write_text(SWEEP)
        sweep = load_sweep(path)
        start = time.perf_counter()
        catalog = build_catalog(sweep)
        seconds = time.perf_counter() - start
    n = len(catalog.variants)
    print(f"planned {n} variants in {seconds:.2f} s ({seconds / n * 1000:.2f} ms each); "
          f"target ≤ 5 s for 1,000: ratio to target {seconds / 5.0:.2f}")


if __name__ == "__main__":
    main()
