"""How a run ended: which trials this run's workers finished, and one exit code with one line.

The exit codes (errors.py, and the README's table):
- 0: every trial of the sweep is finished, or left to another live runner, or the budget
  stopped the run after at least one trial ran (`budget_spent`);
- 3: trials failed, or trials were left waiting that nothing will run (no trial fitted the
  budget, or the workers ended early); the line groups them by reason;
- 4: a full disk stopped the run (its trials are back in the queue);
- 130: Ctrl-C or SIGTERM stopped the run (its trials are back in the queue).
"""

from __future__ import annotations

from collections import Counter
from datetime import datetime

import optuna

from kablate.errors import EXIT_DISK_FULL, EXIT_OK, EXIT_STOPPED, EXIT_TRIALS
from kablate.lifecycle import FAILED
from kablate.trials.liveness import WORKER
from kablate.trials.queue import job_status, tagged_trials, trial_status

REASON_CHARS = 100  # a reason is cut to this length, so that the summary stays one line


def own_counts(study: optuna.Study, worker_names: set[str], since: datetime) -> Counter:
    """Status → number of trials that the workers ``worker_names`` started after ``since``.

    Each worker records its ``host:pid`` on the trial it claims, so two runners on one study
    count only their own trials (a pid reused by a later run is ruled out by ``since``).
    """
    counts: Counter = Counter()
    for trial in study.get_trials(deepcopy=False):
        started = trial.datetime_start
        if trial.user_attrs.get(WORKER) in worker_names and started and started >= since:
            counts[trial_status(trial)] += 1
    return counts


def failure_reasons(study: optuna.Study, keys: list[str]) -> Counter:
    """Reason → number of the jobs ``keys`` whose trials all failed."""
    by_job = tagged_trials(study)
    reasons: Counter = Counter()
    for key in keys:
        if key not in by_job:
            continue
        status, trial = job_status(by_job[key])
        if status == FAILED:
            reason = trial.user_attrs.get("error") or trial.user_attrs.get("outcome") or "unknown"
            reasons[reason.splitlines()[0][:REASON_CHARS]] += 1
    return reasons


def summarize_failures(reasons: dict[str, int]) -> str:
    """``3 trials failed: 2 × RuntimeError: x; 1 × worker-lost``, the commonest reason first."""
    n = sum(reasons.values())
    grouped = "; ".join(
        f"{count} × {reason}" for reason, count in sorted(reasons.items(), key=lambda x: -x[1])
    )
    return f"{n} trial{'s' if n != 1 else ''} failed: {grouped}"


# The budget ended a run as planned when what was left of it could not hold the shortest
# waiting trial, with room for a worker running slower than its calibration (a factor of
# ours); a run whose workers ended with much of the budget left did not end as planned.
BUDGET_SLACK = 3.0
BUDGET_SLACK_SECONDS = 60.0


def budget_spent(summary) -> bool:
    """Whether the budget, not a failure, left the waiting trials unrun."""
    room = max(BUDGET_SLACK * summary.shortest_waiting, BUDGET_SLACK_SECONDS)
    return summary.budget_left <= room


def verdict(summary) -> tuple[int, str]:
    """(exit code, one line saying why when it is not 0) for a `RunSummary`."""
    if summary.disk_full:
        return EXIT_DISK_FULL, summary.disk_full
    if summary.interrupted:
        return EXIT_STOPPED, ""
    if summary.failures:
        return EXIT_TRIALS, summarize_failures(summary.failures)
    left = summary.counts.get("waiting", 0) + summary.counts.get("missing", 0)
    if not left:
        return EXIT_OK, ""
    if summary.budget_seconds and budget_spent(summary):
        if summary.n_ran:
            return EXIT_OK, ""
        return EXIT_TRIALS, (
            f"{left} trials left waiting: none fitted in the --budget (the estimate above says "
            "how long each takes); give a longer budget"
        )
    return EXIT_TRIALS, (
        f"{left} trials could not run: the workers ended before the queue was empty "
        "(run.log says why); rerun the same command"
    )
