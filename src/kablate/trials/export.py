"""Read a sweep's trials back out of storage as plain rows: the results contract.

``trials.csv`` has one row per (variant, seed) of the current sweep, whatever its status, with
at least ``variant, seed, status, val_acc, test_acc, params, macs, rf, train_seconds``.
"""

from __future__ import annotations

import csv
from pathlib import Path

import optuna

from kablate.trials.queue import job_status, tagged_trials

TRIAL_COLUMNS = (
    "variant",
    "variant_id",
    "seed",
    "status",
    "val_acc",
    "test_acc",
    "best_epoch",
    "params",
    "macs",
    "rf",
    "train_seconds",
    "samples_per_second",
    "threads",
    "worker",
    "trial",
    "n_attempts",
)
CURVE_COLUMNS = ("variant", "seed", "epoch", "train_loss", "val_loss", "val_acc", "seconds")


def collect_trials(study: optuna.Study, plan: dict) -> tuple[list[dict], list[dict]]:
    """Rows of trials.csv and curves.csv for the variants and seeds of ``plan``.

    Args:
        plan: the content of ``plan.json`` (variants with costs, seeds).
    """
    by_job = tagged_trials(study)
    rows, curves = [], []
    for seed in plan["seeds"]:
        for v in plan["variants"]:
            key = f"{v['id']}-s{seed}"
            row = {c: None for c in TRIAL_COLUMNS}
            row.update(
                variant=v["name"],
                variant_id=v["id"],
                seed=seed,
                status="waiting",
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
                    worker=attrs.get("worker"),
                )
                for name in (
                    "val_acc",
                    "test_acc",
                    "best_epoch",
                    "train_seconds",
                    "samples_per_second",
                    "threads",
                ):
                    row[name] = attrs.get(name)
                for epoch, tl, vl, va, sec in attrs.get("curve", []):
                    curves.append(
                        dict(
                            zip(
                                CURVE_COLUMNS,
                                (v["name"], seed, epoch, tl, vl, va, sec),
                                strict=True,
                            )
                        )
                    )
            else:
                row["status"] = "missing"  # not enqueued yet (e.g. the run has not started)
            rows.append(row)
    return rows, curves


def write_csv(path: Path, rows: list[dict], columns: tuple[str, ...]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(".csv.tmp")
    with tmp.open("w", newline="") as fh:
        writer = csv.DictWriter(fh, fieldnames=columns, extrasaction="ignore", lineterminator="\n")
        writer.writeheader()
        for row in rows:
            writer.writerow({k: ("" if row.get(k) is None else row.get(k)) for k in columns})
    tmp.replace(path)
