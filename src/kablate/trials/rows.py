"""Read a sweep's trials back out of storage as plain rows: those of trials.csv and curves.csv.

The columns, and the writing of the tables, are kablate.results's (columns.py, tables.py).
"""

from __future__ import annotations

import optuna

from kablate.lifecycle import (
    FAILED,
    MISSING,
    RETIRED,
    RUNNING,
    SETTLED,
    STOPPED,
    WAITING,
    JobKey,
)
from kablate.results.columns import CURVE_COLUMNS, TRIAL_COLUMNS
from kablate.train.record import shown_epoch
from kablate.trials.halving import halted_variants
from kablate.trials.jobs import Job
from kablate.trials.liveness import WORKER
from kablate.trials.queue import job_status, tagged_trials
from kablate.trials.race import RULE_ATTR, read_rounds, retired_variants


def collect_trials(study: optuna.Study, roster: dict) -> tuple[list[dict], list[dict]]:
    """Rows of trials.csv and curves.csv for the variants and seeds of ``roster``.

    Args:
        roster: the variants (with costs) and seeds whose rows count: the content of
            ``plan.json``, with or without the layers.
    """
    by_job = tagged_trials(study)
    # A race's retirements count while the study races (a run with racing off trains them).
    retired = retired_variants(read_rounds(study)) if study.user_attrs.get(RULE_ATTR) else {}
    halted = halted_variants(study)  # stopped by successive halving: no more seeds
    rows, curves = [], []
    for seed in roster["seeds"]:
        for v in roster["variants"]:
            key = str(JobKey(v["id"], seed))
            row = {c: None for c in TRIAL_COLUMNS}
            row.update(
                variant=v["name"],
                variant_id=v["id"],
                seed=seed,
                status=WAITING,
                params=v["params"],
                macs=v["macs"],
                rf=v["rf"],
                n_attempts=0,
            )
            trials = by_job.get(key)
            if trials:
                status, trial = job_status(trials)
                attrs = trial.user_attrs
                row.update(
                    status=status,
                    trial=trial.number,
                    n_attempts=len(trials),
                    worker=attrs.get(WORKER),
                )
                for name in (
                    "val_acc",
                    "test_acc",
                    "score_epoch",
                    "best_epoch",
                    "train_seconds",
                    "samples_per_second",
                    "threads",
                ):
                    row[name] = attrs.get(name)
                for name in ("score_epoch", "best_epoch"):
                    row[name] = shown_epoch(row[name])
                row["predictions"] = attrs.get("predictions") or {}
                for epoch, tl, vl, va, sec in attrs.get("curve", []):
                    curves.append(
                        dict(
                            zip(
                                CURVE_COLUMNS,
                                (v["name"], seed, shown_epoch(epoch), tl, vl, va, sec),
                                strict=True,
                            )
                        )
                    )
            else:
                row["status"] = MISSING  # not enqueued yet (e.g. the run has not started)
                row["predictions"] = {}
            if v["id"] in retired:  # racing gave it no more seeds: the card says why
                row["retired"] = retired[v["id"]]
                row["retired_after"] = retired[v["id"]]["seed"]
                row["retired_why"] = retired[v["id"]].get("why")
                if row["status"] in (MISSING, FAILED):
                    row["status"] = RETIRED
            elif v["id"] in halted and row["status"] in (MISSING, FAILED, WAITING, RETIRED):
                row["status"] = RETIRED  # its waiting trial is (or is being) withdrawn
                row["retired_after"] = halted[v["id"]]
                row["retired_why"] = STOPPED
            rows.append(row)
    return rows, curves


def settled_jobs(study: optuna.Study, jobs: list[Job]) -> set[str]:
    """The keys of ``jobs`` that need no more training, which the estimate, the budget and the
    ETA leave out: finished, retired, or not running and of a variant that gets no more seeds
    (racing retired it while the study races; halving stopped it while the study halves)."""
    by_job = tagged_trials(study)
    out = set(halted_variants(study))
    if study.user_attrs.get(RULE_ATTR):
        out |= set(retired_variants(read_rounds(study)))
    keys = set()
    for job in jobs:
        status = job_status(by_job[job.key])[0] if job.key in by_job else MISSING
        if status in SETTLED or (job.variant_id in out and status != RUNNING):
            keys.add(job.key)
    return keys
