"""The time budget: durations, the replay of the job order, and a budget too short to start."""

from __future__ import annotations

import pytest

from kablate.cli import parse_duration
from kablate.errors import UsageError
from kablate.trials import RunOptions, run_sweep
from kablate.trials.budget import schedule
from kablate.trials.jobs import order_jobs


@pytest.mark.parametrize(
    ("text", "seconds"), [("8h", 28800), ("90m", 5400), ("2h30m", 9000), ("45s", 45)]
)
def test_parse_duration(text, seconds):
    assert parse_duration(text) == seconds


@pytest.mark.parametrize("text", ["", "8", "h", "1d", "0m", "-5m"])
def test_bad_durations_are_usage_errors(text):
    with pytest.raises(UsageError, match="--budget"):
        parse_duration(text)


def test_jobs_are_seed_major():
    jobs = order_jobs([("a", "A"), ("b", "B")], (0, 1, 2))
    assert [(j.variant, j.seed) for j in jobs] == [
        ("A", 0), ("B", 0), ("A", 1), ("B", 1), ("A", 2), ("B", 2)
    ]  # fmt: skip


def test_schedule_replays_the_order_on_the_workers_and_stops_at_the_first_overrun():
    jobs = order_jobs([("a", "A"), ("b", "B")], (0, 1, 2))
    seconds = {"a": 10.0, "b": 30.0}
    # Two workers taking the next job when free (list scheduling), worked by hand:
    # A0 0-10, B0 0-30, A1 10-20, B1 20-50, A2 30-40, B2 40-70.
    plan = schedule(jobs, seconds, n_workers=2)
    assert plan.starts == [0, 0, 10, 20, 30, 40]
    assert plan.total_seconds == 70 and plan.n_fit == 6
    cut = schedule(jobs, seconds, n_workers=2, budget=45)
    assert cut.n_fit == 3  # B1 would end at 50 > 45: it and everything after it never start
    assert cut.fit_seconds == 30
    assert cut.complete_seeds([0, 1, 2], 2, already=[]) == [0]
    assert schedule(jobs, seconds, 1).total_seconds == 120  # one worker: the plain sum
    # Workers free only after 5 s of start-up: every job shifts by 5 s, and B1 (20-50 → 25-55)
    # no longer fits a 50 s budget either, but A1 (15-25) still does.
    late = schedule(jobs, seconds, n_workers=2, budget=50, start=5)
    assert late.starts == [5, 5, 15, 25, 35, 45] and late.total_seconds == 75
    assert late.n_fit == 3 and late.fit_seconds == 35


@pytest.mark.slow
def test_a_budget_too_short_for_any_trial_starts_none_and_prints_the_estimate(tiny_sweep, tmp_path):
    printed = []
    opts = RunOptions(
        results_root=tmp_path / "results",
        workers=1,
        budget_seconds=0.001,  # used up by the calibration itself
        show_progress=False,
        echo=printed.append,
    )
    summary = run_sweep(tiny_sweep, opts)
    # A --budget run races (trials/race.py): only seed round 0 is queued, 2 of the 4 trials.
    assert summary.n_ran == 0 and summary.counts == {"waiting": 2, "missing": 2}
    text = printed[0]
    assert "estimate: 4 trials" in text and "0 of 4 trials fit" in text
    assert "; an upper bound: racing may retire variants, which cannot be known" in text
    order = [line.split()[2:5] for line in text.splitlines() if "seed" in line and "~" in line]
    assert [o[2] for o in order] == ["0", "0", "1", "1"]  # seed-major
    assert "no new trial starts" in (summary.results_dir / "run.log").read_text()


@pytest.mark.slow
def test_dry_run_trains_nothing_and_writes_nothing(tiny_sweep, tmp_path):
    printed = []
    opts = RunOptions(results_root=tmp_path / "results", workers=2, dry_run=True, echo=print)
    opts.echo = printed.append
    summary = run_sweep(tiny_sweep, opts)
    assert summary.n_ran == 0 and not (tmp_path / "results").exists()
    assert "estimate: 4 trials to run take about" in printed[0]
    assert "2 worker(s) x 1 thread(s)" in printed[0]
    assert "upper bound" not in printed[0]  # neither racing (no --budget) nor halving
    # ... and says what 100 validation images can resolve against the 1 pp default margin.
    assert "resolution (80% power, one-sided 5%) with 100 validation images" in printed[0]
    assert "the margin needs" in printed[0]
