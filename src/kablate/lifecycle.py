"""The life of a trial: its states, who may move it from one to the next, and its job key.

A *job* is one (variant, seed). Its key, `JobKey` (``<variant id>-s<seed>``), tags every Optuna
trial run for it (the ``job`` user attribute) and names its folder (`results.paths.trial_dir`).
A job may have several trials over time, one per attempt; the best-ranked one (`RANK`) speaks
for the job (`trials.queue.job_status`), and its state is the job's ``status`` in trials.csv.

The states, and how storage holds each (`trials.queue.trial_status` reads them back):

============  =========================================  ======================================
state         in storage                                 meaning
============  =========================================  ======================================
waiting       WAITING                                    queued; any worker may claim it
running       RUNNING                                    claimed; one worker trains it
done          COMPLETE                                   trained and scored: it has a result
diverged      FAIL, outcome ``diverged``                 its loss became NaN or inf: a result
failed        FAIL, outcome ``error`` or ``duplicate``   it raised, or another trial of its job
                                                         was already live
interrupted   FAIL, outcome ``interrupted``/``disk-full``  stopped by Ctrl-C, SIGTERM or a full
                                                         disk; its job was put back at once
lost          FAIL, outcome ``worker-lost`` (journal     its worker died; the liveness check
              file); FAIL with no outcome (PostgreSQL:   put its job back
              optuna's stale-heartbeat check fails it
              and cannot add one)
retired       FAIL, outcome ``retired``                  racing withdrew it (trials/race.py), or
                                                         halving stopped its variant on another
                                                         seed (``retired_why = "stopped"``)
stopped       PRUNED, outcome ``stopped``                successive halving ended its training
                                                         at a rung (trials/halving.py): its
                                                         result is the last validation score
============  =========================================  ======================================

An interrupted or lost trial shows as ``failed``; its job shows as ``waiting`` again, since the
requeued trial outranks it. trials.csv adds ``missing`` for a job with no trial yet.

*Finished* means done, diverged or stopped (`FINISHED`): the trial has its result and never runs
again. Only a done trial was trained to the end: a stopped trial's result is an early score,
which the analysis never compares with full results (analysis/halving.py).

Who may do what (`TRANSITIONS`; every requeue goes through `trials.queue.requeue`):

- the runner enqueues a job with no trial, or whose trials all failed or were retired, unless
  halving stopped its variant (`trials.queue.enqueue_missing`): → waiting;
- the claim (`trials.queue.claim_next`) moves waiting → running with the storage's
  compare-and-set, so exactly one worker wins; a claimed trial that is not the first live
  trial of its job goes running → failed (``duplicate``);
- the worker that holds a trial ends it: running → done, diverged, stopped (successive halving)
  or failed (``error``); on a
  stop request or a full disk, running → interrupted, and it requeues the job;
- the liveness check (`trials.liveness`), before every claim, moves a running trial whose
  worker is gone to lost, and requeues the job;
- racing, or a worker whose trial halving stopped, withdraws a waiting trial of a variant that
  gets no more seeds with the same compare-and-set as a claim (`trials.queue.withdraw`), and so
  does a claim that finds the variant stopped after winning: → retired.

Nothing moves a finished trial; a resumed job starts a new trial, which reads the old one's
checkpoint.
"""

from __future__ import annotations

from dataclasses import dataclass

# The states a trial can be in (the status column of trials.csv uses the first six, and
# ``missing``); the last two are told apart only by their outcome, and show as ``failed``.
WAITING = "waiting"
RUNNING = "running"
DONE = "done"
DIVERGED = "diverged"
FAILED = "failed"
RETIRED = "retired"
STOPPED = "stopped"  # successive halving ended its training early (trials/halving.py)
INTERRUPTED = "interrupted"
LOST = "lost"
MISSING = "missing"  # trials.csv only: a job with no trial yet (the run has not started)

# The ``outcome`` user attribute of a trial told FAIL, and the state each one means
OUTCOMES = {
    "diverged": DIVERGED,
    "error": FAILED,
    "duplicate": FAILED,
    "interrupted": INTERRUPTED,
    "disk-full": INTERRUPTED,
    "worker-lost": LOST,
    "retired": RETIRED,
    "stopped": STOPPED,
}

# Trials in these states have their result and never run again.
FINISHED = (DONE, DIVERGED, STOPPED)
# A job in one of these needs nothing more: racing gave a retired variant no more seeds.
SETTLED = (*FINISHED, RETIRED)
# How each status counts for its job; the best-ranked trial of a job speaks for it.
RANK = {DONE: 6, DIVERGED: 5, STOPPED: 4, RUNNING: 3, WAITING: 2, FAILED: 1, RETIRED: 0}

# (from, to) → who may make that move. None: the job has no trial yet.
TRANSITIONS = {
    (None, WAITING): ("runner",),
    (FAILED, WAITING): ("runner",),
    (RETIRED, WAITING): ("runner",),  # a run with racing off trains a retired variant
    (WAITING, RUNNING): ("claim",),
    (WAITING, RETIRED): ("race", "runner", "worker", "claim"),  # racing; a variant stopped
    (RUNNING, FAILED): ("claim", "worker"),  # a duplicate; training raised
    (RUNNING, DONE): ("worker",),
    (RUNNING, DIVERGED): ("worker",),
    (RUNNING, STOPPED): ("worker",),  # successive halving, at a rung
    (RUNNING, INTERRUPTED): ("worker",),
    (RUNNING, LOST): ("liveness",),
    (INTERRUPTED, WAITING): ("worker",),  # the job is requeued as a new trial
    (LOST, WAITING): ("liveness",),  # the job is requeued as a new trial
}


def is_finished(status: str) -> bool:
    """Whether a trial (or job) in ``status`` has its result: done, diverged or stopped."""
    return status in FINISHED


def n_finished(statuses) -> int:
    """How many of ``statuses`` are finished."""
    return sum(1 for status in statuses if status in FINISHED)


@dataclass(frozen=True)
class JobKey:
    """The key of one job, ``<variant id>-s<seed>``: stable across reruns and machines."""

    variant_id: str
    seed: int

    def __str__(self) -> str:
        return f"{self.variant_id}-s{self.seed}"

    @classmethod
    def parse(cls, text: str) -> JobKey:
        """The key that ``str`` wrote; ValueError for anything else."""
        variant_id, sep, seed = text.rpartition("-s")
        if not sep or not variant_id or not seed.isdigit():
            raise ValueError(f"{text!r} is not a job key (<variant id>-s<seed>)")
        return cls(variant_id, int(seed))
