"""The benchmark scripts under tests/bench/ run outside the suite, so a rename in the package
can break them unseen: each must at least import (its ``main`` is not called)."""

from __future__ import annotations

import runpy
from pathlib import Path

import pytest

BENCH = sorted((Path(__file__).parent / "bench").glob("bench_*.py"))


def test_there_are_benchmark_scripts():
    assert len(BENCH) >= 6


@pytest.mark.parametrize("script", BENCH, ids=lambda p: p.name)
def test_each_benchmark_script_imports(script):
    names = runpy.run_path(str(script), run_name="bench_import_check")
    assert callable(names.get("main")), f"{script.name} has no main()"
