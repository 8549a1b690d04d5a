"""How a run ended: its own trials, and the exit code a scheduler sees (outcome.py)."""

from __future__ import annotations

from datetime import datetime, timedelta
from pathlib import Path

import pytest
from optuna.trial import TrialState

from kablate.errors import EXIT_DISK_FULL, EXIT_OK, EXIT_STOPPED, EXIT_TRIALS
from kablate.trials.jobs import Job
from kablate.trials.liveness import liveness_for
from kablate.trials.outcome import failure_reasons, own_counts, summarize_failures, verdict
from kablate.trials.queue import claim_next, enqueue_missing
from kablate.trials.runner import RunSummary
from kablate.trials.store import lock_dir, open_study


def test_two_runners_on_one_study_each_count_only_their_own_trials(tmp_path):
    before = datetime.now() - timedelta(seconds=1)
    study = open_study("two", tmp_path, None)
    enqueue_missing(study, [Job(f"v{i}", f"p{i}", 0) for i in range(5)])
    liveness = liveness_for(study, lock_dir(tmp_path, None))
    for worker, outcome in [("a:1", "ok"), ("b:2", "ok"), ("a:1", "ok"), ("b:2", "ok")] + [
        ("a:1", "error")
    ]:
        claim = claim_next(study, liveness)
        claim.trial.set_user_attr("worker", worker)
        if outcome == "ok":
            study.tell(claim.trial, values=[0.5, 1.0])
        else:
            claim.trial.set_user_attr("error", "RuntimeError: boom")
            study.tell(claim.trial, state=TrialState.FAIL)
        liveness.release(claim.token)
    assert own_counts(study, {"a:1"}, before) == {"done": 2, "failed": 1}
    assert own_counts(study, {"b:2"}, before) == {"done": 2}
    assert own_counts(study, {"a:1", "b:2"}, datetime.now() + timedelta(seconds=5)) == {}
    keys = [f"v{i}-s0" for i in range(5)]
    assert failure_reasons(study, keys) == {"RuntimeError: boom": 1}


def summary(**fields) -> RunSummary:
    base = RunSummary(Path("results/x"), n_jobs=6, n_new=0, n_ran=0)
    for name, value in fields.items():
        setattr(base, name, value)
    return base


@pytest.mark.parametrize(
    ("fields", "code", "says"),
    [
        ({"counts": {"done": 6}, "n_ran": 6}, EXIT_OK, ""),
        ({"counts": {"done": 5, "diverged": 1}}, EXIT_OK, ""),
        ({"counts": {"done": 4, "running": 2}, "n_ran": 2}, EXIT_OK, ""),  # another runner's
        # The budget is spent: 20 s left, the shortest waiting trial takes 30 s.
        (
            {
                "counts": {"done": 2, "waiting": 4},
                "n_ran": 2,
                "budget_seconds": 3600,
                "budget_left": 20,
                "shortest_waiting": 30,
            },
            EXIT_OK,
            "",
        ),
        # The workers ended with an hour of an 8 h budget left: not the budget's doing.
        (
            {
                "counts": {"done": 2, "waiting": 4},
                "n_ran": 2,
                "budget_seconds": 8 * 3600,
                "budget_left": 3600,
                "shortest_waiting": 30,
            },
            EXIT_TRIALS,
            "4 trials could not run",
        ),
        (
            {"counts": {"waiting": 6}, "budget_seconds": 1},
            EXIT_TRIALS,
            "6 trials left waiting: none fitted in the --budget",
        ),
        (
            {"counts": {"done": 3, "waiting": 3}, "n_ran": 3},
            EXIT_TRIALS,
            "3 trials could not run",
        ),
        (
            {"counts": {"failed": 6}, "failures": {"RuntimeError: x": 4, "worker-lost": 2}},
            EXIT_TRIALS,
            "6 trials failed: 4 × RuntimeError: x; 2 × worker-lost",
        ),
        ({"counts": {"waiting": 6}, "interrupted": True}, EXIT_STOPPED, ""),
        ({"disk_full": "disk full at x: free space and rerun"}, EXIT_DISK_FULL, "disk full at x"),
    ],
)
def test_the_exit_code_and_its_line(fields, code, says):
    got_code, line = verdict(summary(**fields))
    assert got_code == code
    assert says in line and bool(line) == bool(says)


def test_a_single_failure_is_singular():
    assert summarize_failures({"worker-lost": 1}) == "1 trial failed: 1 × worker-lost"
