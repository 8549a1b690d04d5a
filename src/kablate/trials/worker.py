"""A worker: claim a job, train it, record it, repeat until the queue is empty.

Several workers (processes on one machine, or on several machines sharing a PostgreSQL study)
run this same loop; the study decides who gets which job.
"""

from __future__ import annotations

import json
import logging
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import optuna
from optuna.trial import TrialState

from kablate.costs.catalog import Catalog
from kablate.data.prepare import PreparedData
from kablate.errors import DiskFullError, is_disk_full
from kablate.lifecycle import STOPPED, JobKey
from kablate.results.paths import RECORD_FILE, trial_dir
from kablate.results.write import write_text
from kablate.train.checkpoint import DEFAULT_CHECKPOINT_SECONDS
from kablate.train.loop import TrialInterrupted, train_trial
from kablate.train.record import TrialRecord
from kablate.trials.eta import time_ratio
from kablate.trials.halving import judge_for
from kablate.trials.jobs import Job
from kablate.trials.liveness import WORKER, Liveness, process_name
from kablate.trials.queue import (
    Claim,
    claim_next,
    clean,
    next_waiting_key,
    requeue,
    withdraw_halted,
)
from kablate.trials.race import race_of_study

log = logging.getLogger("kablate")
RACE_POLL_SECONDS = 2.0  # how often a racing worker looks whether its round has ended


@dataclass
class WorkerContext:
    catalog: Catalog
    data: PreparedData
    study: optuna.Study
    results_dir: Path
    threads: int = 1
    device: str = "cpu"
    should_stop: Callable[[], bool] | None = None
    max_trials: int = 0  # 0: until the queue is empty
    deadline: float = 0.0  # time.time() by which every started trial should end; 0: none
    liveness: Liveness | None = None  # liveness.LocalLiveness or HeartbeatLiveness
    order: dict[str, int] | None = None  # job key → position in the sweep's order
    estimates: dict[str, float] | None = None  # variant id → predicted trial seconds
    checkpoint_seconds: float = DEFAULT_CHECKPOINT_SECONDS  # train/checkpoint.py's policy

    @property
    def worker_name(self) -> str:
        return process_name()


def record_attrs(record: TrialRecord) -> dict:
    """The numbers every consumer (status, report) reads from storage, JSON-safe."""
    return {
        "status": record.status,
        "val_acc": clean(record.val_acc),
        "test_acc": clean(record.test_acc),
        "score_epoch": record.score_epoch,
        "best_epoch": record.best_epoch,
        "predictions": record.predictions,
        "train_seconds": round(record.train_seconds, 3),
        "samples_per_second": round(record.samples_per_second, 1),
        "threads": record.threads,
        "steps": record.steps,
        "curve": [
            [e.epoch, clean(e.train_loss), clean(e.val_loss), clean(e.val_acc), round(e.seconds, 3)]
            for e in record.curve
        ],
        "note": record.note,
    }


def run_one(ctx: WorkerContext, claim: Claim) -> str:
    """Train the claimed job and tell the study how it went; return its status.

    Raises:
        DiskFullError: no space left; the job is back in the queue (or, if even that could not
            be written, its trial stays RUNNING and the next run puts it back).
    """
    try:
        return _train_and_tell(ctx, claim.trial, claim.key)
    except DiskFullError as exc:
        put_back(ctx, claim.trial, "disk-full")
        raise exc from None
    except OSError as exc:
        if not is_disk_full(exc):
            raise
        put_back(ctx, claim.trial, "disk-full")
        raise DiskFullError(exc.filename or trial_dir(ctx.results_dir, claim.key)) from None
    finally:
        ctx.liveness.release(claim.token)


def put_back(ctx: WorkerContext, trial: optuna.Trial, outcome: str) -> None:
    """End ``trial`` as FAIL with ``outcome`` and enqueue its job again; the trial was not at
    fault (a stop request, a full disk). On a full disk this is best effort."""
    try:
        trial.set_user_attr("outcome", outcome)
        ctx.study.tell(trial, state=TrialState.FAIL)
        requeue(ctx.study, Job.from_attrs(trial.user_attrs))
    except (DiskFullError, OSError) as exc:
        if not isinstance(exc, DiskFullError) and not is_disk_full(exc):
            raise
        log.warning(
            "trial %s could not be put back in the queue now (disk full); the next run does it",
            trial.user_attrs.get("job"),
        )


def _train_and_tell(ctx: WorkerContext, trial: optuna.Trial, key: str) -> str:
    job = Job.from_attrs(trial.user_attrs)
    item = next(v for v in ctx.catalog.variants if v.variant.id == job.variant_id)
    workdir = trial_dir(ctx.results_dir, key)
    trial.set_user_attr(WORKER, ctx.worker_name)
    log.info("start %s (variant %s, seed %d) on %s", key, job.variant, job.seed, ctx.worker_name)
    started = time.perf_counter()
    try:
        record = train_trial(
            item.blueprint,
            ctx.catalog.sweep.recipe,
            ctx.data,
            job.seed,
            workdir=workdir,
            threads=ctx.threads,
            device=ctx.device,
            should_stop=ctx.should_stop,
            judge=judge_for(ctx.study, trial, ctx.catalog.baseline.variant.id),
            checkpoint_seconds=ctx.checkpoint_seconds,
        )
    except TrialInterrupted:
        put_back(ctx, trial, "interrupted")
        log.info("stopped %s; it is back in the queue and resumes from its checkpoint", key)
        raise
    except DiskFullError:
        raise
    except Exception as exc:
        if is_disk_full(exc):
            raise
        trial.set_user_attr("outcome", "error")
        trial.set_user_attr("error", f"{type(exc).__name__}: {exc}"[:500])
        ctx.study.tell(trial, state=TrialState.FAIL)
        log.exception("trial %s failed", key)
        return "failed"
    values = record_attrs(record)
    # The whole trial as the worker saw it (model, training, test); the rest is the runner's.
    values["trial_seconds"] = round(time.perf_counter() - started, 3)
    for name, value in values.items():
        trial.set_user_attr(name, value)
    write_text(workdir / RECORD_FILE, json.dumps(record.to_dict(), indent=1, default=str))
    if record.status == "diverged":
        trial.set_user_attr("outcome", "diverged")
        ctx.study.tell(trial, state=TrialState.FAIL)
    elif record.status == STOPPED:  # successive halving: an early score, not a result
        trial.set_user_attr("outcome", STOPPED)
        ctx.study.tell(trial, state=TrialState.PRUNED)
        withdraw_halted(ctx.study, ctx.liveness)  # its variant gets no more seeds
    else:
        ctx.study.tell(trial, values=[record.val_acc, float(item.cost.macs)])
    log.info(
        "done %s: %s val %.4f test %.4f in %.1fs",
        key,
        record.status,
        record.val_acc,
        record.test_acc,
        record.train_seconds,
    )
    return record.status


def fits_budget(ctx: WorkerContext, scale: float) -> bool:
    """Whether the next waiting trial is predicted to end before the deadline."""
    if not ctx.deadline:
        return True
    key = next_waiting_key(ctx.study, ctx.order or {})
    if key is None:
        return True
    predicted = (ctx.estimates or {}).get(JobKey.parse(key).variant_id, 0.0) * scale
    left = ctx.deadline - time.time()
    if predicted > left:
        log.info(
            "budget: the next trial %s needs about %.0fs but %.0fs are left: no new trial starts",
            key,
            predicted,
            max(0.0, left),
        )
        return False
    return True


def others_running(ctx: WorkerContext) -> int:
    return len(ctx.study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)))


def work(ctx: WorkerContext, on_finish: Callable[[str, str], None] | None = None) -> int:
    """Run jobs until the queue is empty (or a limit is hit); return how many ran.

    Before every claim, trials whose worker died are failed and requeued (liveness.py). On a
    server storage an idle worker waits while trials run elsewhere, so that it can take over
    one whose machine stops sending heartbeats. In a race (trials/race.py) a worker that finds
    the queue empty decides the rounds it can and enqueues the next one; while a round still
    runs elsewhere it waits for it.
    """
    n, took, predictions = 0, {}, {}  # job key → seconds taken, predicted
    race = race_of_study(ctx.study, ctx.catalog, ctx.data.val.labels)
    while not (ctx.max_trials and n >= ctx.max_trials):
        if ctx.should_stop is not None and ctx.should_stop():
            break
        ctx.liveness.recover(ctx.study)
        if not fits_budget(ctx, time_ratio(took, predictions)):
            break
        claim = claim_next(ctx.study, ctx.liveness, ctx.order)
        if claim is None:
            if race is not None:
                with ctx.liveness.queue_lock():
                    if race.advance(ctx.study, ctx.liveness):
                        continue
            if (ctx.liveness.remote or race is not None) and others_running(ctx):
                time.sleep(RACE_POLL_SECONDS if race is not None else ctx.liveness.interval)
                continue
            break
        started = time.time()
        status = run_one(ctx, claim)
        predicted = (ctx.estimates or {}).get(JobKey.parse(claim.key).variant_id)
        if predicted and status == "done":  # a stopped or diverged trial ended early
            took[claim.key], predictions[claim.key] = time.time() - started, predicted
        n += 1
        if on_finish is not None:
            on_finish(claim.key, status)
    return n
