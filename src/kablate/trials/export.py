"""Read a sweep's trials back out of storage as plain rows: the results contract.

``trials.csv`` has one row per (variant, seed) of the current sweep, whatever its status, with
at least ``variant, seed, status, val_acc, test_acc, params, macs, rf, train_seconds``.
``predictions.csv.gz`` has one row per (finished trial, scored image): ``variant, seed, split,
index, label, predicted``, where ``split`` is ``val`` or ``test`` and ``index`` is the image's
index in its source, as listed under ``indices`` in ``data.json``.
"""

from __future__ import annotations

import csv
import gzip
import io
from pathlib import Path

import optuna

from kablate.train.evidence import SPLITS, decode_predictions
from kablate.train.record import shown_epoch
from kablate.trials.queue import RETIRED, job_status, tagged_trials
from kablate.trials.race import RULE_ATTR, read_rounds, retired_variants

TRIAL_COLUMNS = (
    "variant",
    "variant_id",
    "seed",
    "status",
    "val_acc",
    "test_acc",
    "score_epoch",
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
    "retired_after",  # racing: the seed after which the variant was retired (trials/race.py)
)
CURVE_COLUMNS = ("variant", "seed", "epoch", "train_loss", "val_loss", "val_acc", "seconds")
PREDICTION_COLUMNS = ("variant", "seed", "split", "index", "label", "predicted")
PREDICTIONS_FILE = "predictions.csv.gz"


def collect_trials(study: optuna.Study, plan: dict) -> tuple[list[dict], list[dict]]:
    """Rows of trials.csv and curves.csv for the variants and seeds of ``plan``.

    Args:
        plan: the content of ``plan.json`` (variants with costs, seeds).
    """
    by_job = tagged_trials(study)
    # A race's retirements count while the study races (a run with racing off trains them).
    retired = retired_variants(read_rounds(study)) if study.user_attrs.get(RULE_ATTR) else {}
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
                row["status"] = "missing"  # not enqueued yet (e.g. the run has not started)
                row["predictions"] = {}
            if v["id"] in retired:  # racing gave it no more seeds: the card says why
                row["retired"] = retired[v["id"]]
                row["retired_after"] = retired[v["id"]]["seed"]
                if row["status"] in ("missing", "failed"):
                    row["status"] = RETIRED
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


def write_predictions(path: Path, rows: list[dict], data: dict) -> int:
    """Write ``predictions.csv.gz`` from the trial rows of `collect_trials` (finished trials
    with their encoded predictions) and ``data.json``'s indices and labels; return its rows.

    Written to a temporary file and renamed, so a reader never sees half a file.
    """
    tmp = path.with_name(path.name + ".tmp")
    n = 0
    # mtime=0: the same evidence gives the same bytes.
    with (
        open(tmp, "wb") as raw,
        gzip.GzipFile(fileobj=raw, mode="wb", mtime=0) as gz,
        io.TextIOWrapper(gz, encoding="utf-8", newline="") as text,
    ):
        writer = csv.writer(text, lineterminator="\n")
        writer.writerow(PREDICTION_COLUMNS)
        for row in rows:
            for split in SPLITS:
                encoded = (row.get("predictions") or {}).get(split)
                if not encoded or row.get("status") != "done":
                    continue
                predicted = decode_predictions(encoded).tolist()
                index, label = data["indices"][split], data["labels"][split]
                for i, y, p in zip(index, label, predicted, strict=True):
                    writer.writerow((row["variant"], row["seed"], split, i, y, p))
                n += len(predicted)
    tmp.replace(path)
    return n
