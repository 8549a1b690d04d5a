"""The job queue on top of an Optuna study: enqueue what is missing, claim the next job.

Optuna facts this relies on (checked against optuna 5.0; see DEVELOPERS.md):
- ``enqueue_trial`` adds a WAITING trial; ``ask()`` pops one WAITING trial and marks it RUNNING.
- Once no WAITING trial is left, ``ask()`` silently creates a new, un-enqueued trial. So every
  enqueued trial is tagged with a ``job`` user attribute, and an untagged trial means "queue
  empty": it is finished as FAIL at once and the worker stops.
"""

from __future__ import annotations

import math
from collections import defaultdict

import optuna
from optuna.trial import FrozenTrial, TrialState

from kablate.trials.jobs import Job

# How each trial state counts for its job; the best-ranked trial of a job speaks for it.
RANK = {"done": 5, "diverged": 4, "running": 3, "waiting": 2, "failed": 1}


def trial_status(trial: FrozenTrial) -> str:
    """done | diverged | running | waiting | failed."""
    if trial.state == TrialState.COMPLETE:
        return "done"
    if trial.state == TrialState.RUNNING:
        return "running"
    if trial.state == TrialState.WAITING:
        return "waiting"
    if trial.user_attrs.get("outcome") == "diverged":
        return "diverged"
    return "failed"


def tagged_trials(study: optuna.Study) -> dict[str, list[FrozenTrial]]:
    """The study's trials grouped by job key (untagged trials are left out)."""
    by_job: dict[str, list[FrozenTrial]] = defaultdict(list)
    for trial in study.get_trials(deepcopy=False):
        key = trial.user_attrs.get("job")
        if key:
            by_job[key].append(trial)
    return by_job


def job_status(trials: list[FrozenTrial]) -> tuple[str, FrozenTrial]:
    """The status of one job and the trial that speaks for it."""
    best = max(trials, key=lambda t: (RANK[trial_status(t)], t.number))
    return trial_status(best), best


def enqueue_missing(study: optuna.Study, jobs: list[Job]) -> int:
    """Enqueue every job that is not done, diverged, running or waiting; return how many."""
    existing = tagged_trials(study)
    n = 0
    for job in jobs:
        trials = existing.get(job.key)
        if trials and job_status(trials)[0] != "failed":
            continue
        study.enqueue_trial({}, user_attrs=job.attrs())
        n += 1
    return n


def has_waiting(study: optuna.Study) -> bool:
    return bool(study.get_trials(deepcopy=False, states=(TrialState.WAITING,)))


def claim_next(study: optuna.Study) -> tuple[optuna.Trial, str] | None:
    """Pop the next waiting job as a running trial, or None when the queue is empty."""
    if not has_waiting(study):
        return None
    trial = study.ask()
    key = trial.user_attrs.get("job")
    if not key:  # ask() made a fresh trial: someone else took the last waiting one
        trial.set_user_attr("outcome", "queue-empty")
        study.tell(trial, state=TrialState.FAIL)
        return None
    return trial, key


def clean(value: float) -> float | None:
    """JSON-safe float: NaN and inf become None."""
    return None if value is None or not math.isfinite(value) else float(value)
