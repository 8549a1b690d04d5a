"""`kablate run --dry-run` on a [search] sweep: the search and its finalists, from the start
plans' calibrated times (here fixed by hand, so each printed figure can be worked out)."""

from __future__ import annotations

from types import SimpleNamespace

import pytest

import kablate.trials.search_estimate as estimate
from kablate.costs.catalog import build_catalog
from kablate.spec import load_sweep
from kablate.trials.runner import choose_staffing
from tests.conftest import REPO


@pytest.mark.parametrize("workers", [1, 2, 3])
def test_the_search_and_the_finalists_are_bounded_by_the_start_plans_times(monkeypatch, workers):
    sweep = load_sweep(REPO / "sweeps" / "search-digits.toml")  # budget 20, 3 seeds, 0 [[plan]]
    catalog = build_catalog(sweep)
    timed = []

    def calibrate(probe, data, threads):
        # The start plans: every group at one spec (3, 5, 3:depthwise): 2 s, 6 s and 4 s.
        names = [item.name for item in probe.variants]
        timed.extend(names)
        seconds = {"3": 2.0, "5": 6.0, "3:depthwise": 4.0}
        spec = {name: name.split("=")[-1] for name in names}
        return {n: SimpleNamespace(trial_seconds=seconds[spec[n]]) for n in names}

    monkeypatch.setattr(estimate, "calibrate", calibrate)
    text = estimate.search_estimate(catalog, None, choose_staffing(workers, 1, 100))
    assert len(timed) == 3  # the three uniform plans of the space
    # Worked by hand: the search is 20 trials; at best all at 2 s spread over the workers, at
    # worst ceil(20 / workers) in a row at 6 s. The finalists: at most 20 on the front plus
    # the baseline, × 3 seeds = 63 trials, ceil(63 / workers) in a row at 6 s.
    low = {1: "40s", 2: "20s", 3: "13s"}[workers]  # 40 / 3 = 13.3 s, not ceil(20 / 3) × 2
    high = {1: "2m00s", 2: "1m00s", 3: "42s"}[workers]
    bound = {1: "6m18s", 2: "3m12s", 3: "2m06s"}[workers]
    total = {1: "8m18s", 2: "4m12s", 3: "2m48s"}[workers]
    assert "search: 20 plans at 2.0–6.0 s per trial (timed on the 3 start plan(s))" in text
    assert f"on {workers} worker(s): about {low} to {high}" in text
    assert (
        "finalists: at most 21 plans (the front found, at most the budget; the baseline; " in text
    )
    assert f"× 3 seeds = 63 trials: at most about {bound}" in text
    assert f"in all, at most about {total}" in text
