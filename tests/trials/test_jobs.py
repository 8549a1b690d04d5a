"""The order of the jobs within a seed round: longest first (trials/jobs.py), as the workers
claim them."""

from __future__ import annotations

import pytest

from kablate.trials import RunOptions, open_results, run_sweep
from kablate.trials.budget import Calibration, schedule
from kablate.trials.jobs import claim_order, longest_first, order_jobs
from tests.conftest import TINY_SWEEP, write_sweep


def test_each_seed_round_runs_longest_first_and_the_rounds_keep_their_order():
    jobs = order_jobs([("a", "A"), ("b", "B"), ("c", "C"), ("d", "D")], (0, 1))
    seconds = {"a": 10.0, "b": 30.0, "c": 20.0, "d": 20.0}  # c and d tie: plan order
    ordered = longest_first(jobs, seconds)
    assert [(j.variant, j.seed) for j in ordered] == [
        ("B", 0), ("C", 0), ("D", 0), ("A", 0), ("B", 1), ("C", 1), ("D", 1), ("A", 1)
    ]  # fmt: skip
    assert list(claim_order(jobs, seconds)) == [j.key for j in ordered]
    # Without predictions (nothing calibrated) the plan's seed-major order stays.
    assert longest_first(jobs, {}) == jobs


def test_longest_first_ends_a_round_sooner_than_plan_order_on_a_hand_worked_case():
    # Two workers, one round of 1 s, 1 s, 2 s jobs, worked by hand (list scheduling: each
    # worker takes the next job when free). Plan order: A 0-1, B 0-1, C 1-3, so 3 s. Longest
    # first: C 0-2, A 0-1, B 1-2, so 2 s, the optimum, within Graham's (1969) bound for
    # longest-processing-time-first list scheduling, (4/3 - 1/(3m)) x the optimum.
    jobs = order_jobs([("a", "A"), ("b", "B"), ("c", "C")], (0,))
    seconds = {"a": 1.0, "b": 1.0, "c": 2.0}
    assert schedule(jobs, seconds, n_workers=2).total_seconds == 3
    assert schedule(longest_first(jobs, seconds), seconds, n_workers=2).total_seconds == 2


# The tiny sweep at one seed, with a third plan.
THREE_PLANS = (
    TINY_SWEEP.replace("seeds = [0, 1]", "seeds = [0]")
    + """
[[plan]]
name = "body-5"
body = "5"
"""
)


@pytest.mark.slow
@pytest.mark.parametrize("workers", [1, 2])
def test_the_workers_claim_the_longest_trial_of_a_round_first(tmp_path, monkeypatch, workers):
    # The calibration's predictions, made up so that the longest-first order (all-3, body-5,
    # stem-5) differs from the plan's (all-3, stem-5, body-5).
    predicted = {"all-3": 3.0, "stem-5": 1.0, "body-5": 2.0}

    def calibrate(catalog, data, threads, checkpoint_seconds):
        return {
            v.variant.id: Calibration(v.variant.id, 0.0, 0.0, 0.0, predicted[v.name])
            for v in catalog.variants
        }

    monkeypatch.setattr("kablate.trials.runner.calibrate", calibrate)
    opts = RunOptions(results_root=tmp_path / "results", workers=workers, show_progress=False)
    summary = run_sweep(write_sweep(tmp_path, THREE_PLANS), opts)
    assert summary.counts == {"done": 3}
    trials = open_results(summary.results_dir).study.get_trials()
    claimed = [t.user_attrs["variant"] for t in sorted(trials, key=lambda t: t.datetime_start)]
    if workers == 1:
        assert claimed == ["all-3", "body-5", "stem-5"]
    else:  # the workers (processes, given the predictions) claim the two longest at once
        assert set(claimed[:2]) == {"all-3", "body-5"}
