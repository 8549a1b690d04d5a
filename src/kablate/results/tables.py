"""The tables of a results folder: trials.csv, curves.csv and predictions.csv.gz.

`kablate run` writes them from storage as trials end, and `kablate report` writes them again
from its analysis, both through `write_trial_tables`, so the two cannot disagree on a file
name or a column.
"""

from __future__ import annotations

import csv
import gzip
import io
from pathlib import Path

from kablate.lifecycle import DONE
from kablate.results.columns import CURVE_COLUMNS, PREDICTION_COLUMNS, TRIAL_COLUMNS
from kablate.results.data_record import DataRecord
from kablate.results.evidence import SPLITS, decode_predictions
from kablate.results.paths import CURVES_FILE, PREDICTIONS_FILE, TRIALS_FILE
from kablate.results.write import atomic_write, write_csv


def write_trial_tables(folder: Path, rows: list[dict], curves: list[dict]) -> None:
    """trials.csv and curves.csv in ``folder`` from trial rows and curve rows."""
    write_csv(folder / TRIALS_FILE, rows, TRIAL_COLUMNS)
    write_csv(folder / CURVES_FILE, curves, CURVE_COLUMNS)


def write_predictions(folder: Path, rows: list[dict], data: DataRecord) -> int:
    """predictions.csv.gz in ``folder`` from trial rows (finished trials with their encoded
    predictions) and the data record's indices and labels; return its number of rows."""
    n = 0

    def write(raw) -> None:
        nonlocal n
        # mtime=0 and a fixed name in the header: the same evidence gives the same bytes.
        with (
            gzip.GzipFile("predictions.csv", "wb", fileobj=raw, mtime=0) as gz,
            io.TextIOWrapper(gz, encoding="utf-8", newline="") as text,
        ):
            writer = csv.writer(text, lineterminator="\n")
            writer.writerow(PREDICTION_COLUMNS)
            for row in rows:
                for split in SPLITS:
                    encoded = (row.get("predictions") or {}).get(split)
                    if not encoded or row.get("status") != DONE:
                        continue
                    predicted = decode_predictions(encoded).tolist()
                    index, label = data.indices[split], data.labels[split]
                    for i, y, p in zip(index, label, predicted, strict=True):
                        writer.writerow((row["variant"], row["seed"], split, i, y, p))
                    n += len(predicted)

    atomic_write(folder / PREDICTIONS_FILE, write)
    return n
