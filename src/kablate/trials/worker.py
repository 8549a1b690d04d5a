"""A worker: claim a job, train it, record it, repeat until the queue is empty.

Several workers (processes on one machine, or on several machines sharing a PostgreSQL study)
run this same loop; the study decides who gets which job.
"""

from __future__ import annotations

import json
import logging
import os
import socket
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import optuna
from optuna.trial import TrialState

from kablate.costs.catalog import Catalog
from kablate.data.prepare import PreparedData
from kablate.train.loop import TrialInterrupted, train_trial
from kablate.train.record import TrialRecord
from kablate.trials.jobs import Job
from kablate.trials.queue import claim_next, clean

log = logging.getLogger("kablate")


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
    deadline: float = 0.0  # time.time() after which no new trial starts; 0: none

    @property
    def worker_name(self) -> str:
        return f"{socket.gethostname()}:{os.getpid()}"


def trial_dir(results_dir: Path, key: str) -> Path:
    return results_dir / "trials" / key


def record_attrs(record: TrialRecord) -> dict:
    """The numbers every consumer (status, report) reads from storage, JSON-safe."""
    return {
        "status": record.status,
        "val_acc": clean(record.best_val_acc),
        "test_acc": clean(record.test_acc),
        "best_epoch": record.best_epoch,
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


def run_one(ctx: WorkerContext, trial: optuna.Trial, key: str) -> str:
    """Train the claimed job and tell the study how it went; return its status."""
    attrs = trial.user_attrs
    job = Job(attrs["variant_id"], attrs["variant"], int(attrs["seed"]))
    item = next(v for v in ctx.catalog.variants if v.variant.id == job.variant_id)
    workdir = trial_dir(ctx.results_dir, key)
    trial.set_user_attr("worker", ctx.worker_name)
    log.info("start %s (variant %s, seed %d) on %s", key, job.variant, job.seed, ctx.worker_name)
    try:
        record = train_trial(
            item.cost.layout,
            ctx.catalog.sweep.recipe,
            ctx.data,
            job.seed,
            workdir=workdir,
            threads=ctx.threads,
            device=ctx.device,
            should_stop=ctx.should_stop,
        )
    except TrialInterrupted:
        trial.set_user_attr("outcome", "interrupted")
        ctx.study.tell(trial, state=TrialState.FAIL)
        ctx.study.enqueue_trial({}, user_attrs=job.attrs())  # back in the queue
        raise
    except Exception as exc:
        trial.set_user_attr("outcome", "error")
        trial.set_user_attr("error", f"{type(exc).__name__}: {exc}"[:500])
        ctx.study.tell(trial, state=TrialState.FAIL)
        log.exception("trial %s failed", key)
        return "failed"
    values = record_attrs(record)
    for name, value in values.items():
        trial.set_user_attr(name, value)
    workdir.mkdir(parents=True, exist_ok=True)
    (workdir / "record.json").write_text(json.dumps(record.to_dict(), indent=1, default=str))
    if record.status == "diverged":
        trial.set_user_attr("outcome", "diverged")
        ctx.study.tell(trial, state=TrialState.FAIL)
    else:
        ctx.study.tell(trial, values=[record.best_val_acc, float(item.cost.macs)])
    log.info(
        "done %s: %s val %.4f test %.4f in %.1fs",
        key,
        record.status,
        record.best_val_acc,
        record.test_acc,
        record.train_seconds,
    )
    return record.status


def work(ctx: WorkerContext, on_finish: Callable[[str, str], None] | None = None) -> int:
    """Run jobs until the queue is empty (or a limit is hit); return how many ran."""
    n = 0
    while not (ctx.max_trials and n >= ctx.max_trials):
        if ctx.deadline and time.time() >= ctx.deadline:
            log.info("budget reached: no new trial starts")
            break
        if ctx.should_stop is not None and ctx.should_stop():
            break
        claimed = claim_next(ctx.study)
        if claimed is None:
            break
        trial, key = claimed
        status = run_one(ctx, trial, key)
        n += 1
        if on_finish is not None:
            on_finish(key, status)
    return n
