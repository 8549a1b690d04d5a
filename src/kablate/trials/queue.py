"""The job queue on top of an Optuna study: enqueue what is missing, claim the next job.

How Optuna 5.0 hands out enqueued trials, and what we add (checked by tests/trials/):

- ``enqueue_trial`` adds a WAITING trial. ``ask()`` pops one WAITING trial, but once none is
  left it silently creates a new, un-enqueued trial. So we do not call ``ask()``: `claim_next`
  walks the WAITING trials itself and claims one with the storage's compare-and-set,
  ``set_trial_state_values(id, RUNNING)``, which returns False when another process already
  moved the trial out of WAITING (BaseStorage's documented contract). No trial is invented.
- That compare-and-set is atomic on the journal file (an ordered, locked log) and on
  PostgreSQL (``SELECT ... FOR UPDATE``), but not on SQLite, which ignores ``FOR UPDATE``.
  On local storages the claim therefore happens under a host-local ``flock`` for that trial
  (liveness.LocalLiveness), which serializes it among the processes of one machine.
- Two runners starting at once on a shared PostgreSQL study may both enqueue a missing job.
  A claimed trial therefore runs only if it is the lowest-numbered live (WAITING or RUNNING)
  trial of its job and its job is not finished; otherwise it is told FAIL with
  ``outcome = "duplicate"``. Trial numbers never change, so every worker reaches the same
  verdict, and exactly one trial per job trains.
- A job that needs no more seeds (racing retired its variant, trials/race.py; successive
  halving stopped its variant on a seed, trials/halving.py) is withdrawn: `withdraw` takes its
  waiting trial with the same compare-and-set as a claim and tells it FAIL with
  ``outcome = "retired"``, so a claim and a withdrawal never both win one trial. A worker may
  read the queue before a variant is stopped and win the trial after: `claim_next` therefore
  looks again, after its compare-and-set, whether the variant was stopped meanwhile, and
  withdraws the trial instead of training it. Its compare-and-set came after the stop, or the
  stop came after it, so no trial of a stopped variant starts after the stop was recorded.
"""

from __future__ import annotations

import logging
import math
import time
from collections import defaultdict
from collections.abc import Mapping
from dataclasses import dataclass

import optuna
from optuna.trial import FrozenTrial, TrialState

from kablate.lifecycle import (
    DIVERGED,
    DONE,
    FAILED,
    RANK,
    RETIRED,
    RUNNING,
    STOPPED,
    WAITING,
    is_finished,
)
from kablate.trials.halving import halted_variants
from kablate.trials.jobs import Job

log = logging.getLogger("kablate")


def trial_status(trial: FrozenTrial) -> str:
    """done | diverged | stopped | running | waiting | failed | retired (lifecycle.py: an
    interrupted or lost trial shows as failed)."""
    if trial.state == TrialState.COMPLETE:
        return DONE
    if trial.state == TrialState.RUNNING:
        return RUNNING
    if trial.state == TrialState.WAITING:
        return WAITING
    if trial.user_attrs.get("outcome") in (DIVERGED, RETIRED, STOPPED):
        return trial.user_attrs["outcome"]
    return FAILED


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
    """Enqueue every job that is not done, diverged, running or waiting; return how many.

    A job whose last trial failed (an error, an abandoned or interrupted run) is enqueued again,
    and so is one that racing withdrew, when a caller lists it (a run with racing off). The
    jobs of a variant that successive halving stopped are not (`halving.halted_variants`).
    Callers hold ``liveness.queue_lock()`` so that two local runners do not both enqueue a job.
    """
    existing = tagged_trials(study)
    halted = halted_variants(study)
    n = 0
    for job in jobs:
        if job.variant_id in halted:
            continue
        trials = existing.get(job.key)
        if trials and job_status(trials)[0] not in (FAILED, RETIRED):
            continue
        requeue(study, job)
        n += 1
    return n


def requeue(study: optuna.Study, job: Job) -> None:
    """Put ``job`` in the queue as a new WAITING trial: the one way a job is (re)queued, by the
    runner, by a worker that puts its trial back, and by the liveness check (lifecycle.py)."""
    study.enqueue_trial({}, user_attrs=job.attrs())


def requeue_lost(study: optuna.Study, trial: FrozenTrial) -> None:
    """Requeue the job of a trial whose worker was lost (the liveness check; on PostgreSQL, the
    storage's callback for a stale heartbeat)."""
    if not trial.user_attrs.get("job"):
        return
    job = Job.from_attrs(trial.user_attrs)
    requeue(study, job)
    log.warning("trial %s had lost its worker: back in the queue", job.key)


def has_waiting(study: optuna.Study) -> bool:
    return bool(study.get_trials(deepcopy=False, states=(TrialState.WAITING,)))


@dataclass
class Claim:
    trial: optuna.Trial
    key: str
    token: object  # the liveness token, released after the trial is told


def is_first_live(trials: list[FrozenTrial], number: int) -> bool:
    """Whether trial ``number`` is the one of its job's trials that should train."""
    for other in trials:
        if other.number == number:
            continue
        status = trial_status(other)
        if is_finished(status):
            return False
        if status in (RUNNING, WAITING) and other.number < number:
            return False
    return True


def take(study: optuna.Study, liveness, trial_id: int):
    """Move a waiting trial to RUNNING with the storage's compare-and-set (under the liveness
    check's hold, which serializes local claims); the held token when this process won, else
    None (another process took it first). The one take of a claim and of a withdrawal."""
    token = liveness.hold(trial_id)
    if token is None:
        return None
    storage = study._storage  # noqa: SLF001 (the compare-and-set lives on the storage)
    try:
        won = storage.set_trial_state_values(trial_id, TrialState.RUNNING)
    except optuna.exceptions.UpdateFinishedTrialError:
        won = False
    if not won:
        liveness.release(token)
        return None
    return token


def claim_next(study: optuna.Study, liveness, order: dict[str, int] | None = None) -> Claim | None:
    """Claim the next waiting job (in ``order`` of job keys, else by trial number), or None.

    One read of the study serves both the choice and the duplicate check: every trial of the
    job with a lower number than the candidate already existed when it was read, and a
    higher-numbered one can only finish after passing the same check, which it fails while the
    candidate is live.
    """
    order = order or {}
    while True:
        trials = study.get_trials(deepcopy=False)
        by_job: dict[str, list[FrozenTrial]] = defaultdict(list)
        for t in trials:
            if t.user_attrs.get("job"):
                by_job[t.user_attrs["job"]].append(t)
        waiting = [t for t in trials if t.state == TrialState.WAITING and t.user_attrs.get("job")]
        if not waiting:
            return None
        waiting.sort(key=lambda t: (order.get(t.user_attrs["job"], len(order)), t.number))
        for candidate in waiting:
            token = take(study, liveness, candidate._trial_id)
            if token is None:
                continue
            liveness.started(study, candidate._trial_id)
            trial = optuna.Trial(study, candidate._trial_id)
            key = candidate.user_attrs["job"]
            # Read after the compare-and-set: a stop recorded before it is seen (docstring).
            halted = halted_variants(study).get(candidate.user_attrs.get("variant_id"))
            if halted is not None:
                tell_withdrawn(study, trial, halted_why(halted))
            elif is_first_live(by_job[key], candidate.number):
                return Claim(trial, key, token)
            else:
                trial.set_user_attr("outcome", "duplicate")
                study.tell(trial, state=TrialState.FAIL)
            liveness.release(token)
            break  # read the queue again
        else:
            time.sleep(0.05)  # every waiting trial was being claimed by someone else: look again


def halted_why(seed: int) -> dict:
    """What a withdrawn trial of a variant that successive halving stopped on ``seed`` records
    (trials.csv's ``retired_why`` and ``retired_after``)."""
    return {"retired_why": STOPPED, "retired_after": seed}


def tell_withdrawn(study: optuna.Study, trial: optuna.Trial, why: dict) -> None:
    """End a trial that this process holds (it won the compare-and-set) as retired."""
    trial.set_user_attr("outcome", RETIRED)
    for name, value in why.items():
        trial.set_user_attr(name, value)
    study.tell(trial, state=TrialState.FAIL)


def withdraw(study: optuna.Study, liveness, variants: Mapping[str, dict]) -> int:
    """Tell FAIL, with ``outcome = "retired"`` and the variant's entry of ``variants`` as user
    attributes, every waiting trial of those variants that this process can take (the same
    compare-and-set as `claim_next`); how many."""
    if not variants:
        return 0
    n = 0
    for trial in study.get_trials(deepcopy=False, states=(TrialState.WAITING,)):
        why = variants.get(trial.user_attrs.get("variant_id"))
        if why is None:
            continue
        token = take(study, liveness, trial._trial_id)
        if token is not None:
            tell_withdrawn(study, optuna.Trial(study, trial._trial_id), why)
            liveness.release(token)
            n += 1
    return n


def withdraw_halted(study: optuna.Study, liveness) -> int:
    """Withdraw the waiting trials of every variant that successive halving stopped; how many."""
    halted = halted_variants(study)
    n = withdraw(study, liveness, {vid: halted_why(seed) for vid, seed in halted.items()})
    if n:
        log.info("halving: %d waiting trial(s) of stopped variants withdrawn", n)
    return n


def next_waiting_key(study: optuna.Study, order: dict[str, int]) -> str | None:
    """The job key that `claim_next` would try first."""
    keys = [
        t.user_attrs["job"]
        for t in study.get_trials(deepcopy=False, states=(TrialState.WAITING,))
        if t.user_attrs.get("job")
    ]
    return min(keys, key=lambda k: order.get(k, len(order))) if keys else None


def clean(value: float) -> float | None:
    """JSON-safe float: NaN and inf become None."""
    return None if value is None or not math.isfinite(value) else float(value)
