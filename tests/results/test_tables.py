"""The tables of a results folder: trials.csv and curves.csv with their columns, and
predictions.csv.gz with one row per (finished trial, scored image), read back with pandas and
gzip, the same evidence giving the same bytes."""

from __future__ import annotations

import gzip

import numpy as np
import pandas as pd

from kablate.results.columns import CURVE_COLUMNS, PREDICTION_COLUMNS, TRIAL_COLUMNS
from kablate.results.evidence import encode_predictions
from kablate.results.paths import CURVES_FILE, PREDICTIONS_FILE, TRIALS_FILE
from kablate.results.tables import write_predictions, write_trial_tables
from tests.analysis.synthetic import data_json

RECORD = data_json(n_images=4, n_classes=3)  # labels 0, 1, 2, 0 for val and test


def trial(variant, seed, status, val=None, test=None) -> dict:
    predictions = {}
    if val is not None:
        predictions = {"val": encode_predictions(np.array(val))}
        predictions["test"] = encode_predictions(np.array(test))
    return {"variant": variant, "seed": seed, "status": status, "predictions": predictions}


def test_predictions_have_a_row_per_finished_trial_and_scored_image(tmp_path):
    rows = [
        trial("a", 0, "done", [0, 1, 1, 0], [2, 1, 2, 0]),
        trial("b", 0, "running"),
        trial("c", 0, "diverged", [0, 0, 0, 0], [0, 0, 0, 0]),  # not done: not evidence
    ]
    n = write_predictions(tmp_path, rows, RECORD)
    table = pd.read_csv(tmp_path / PREDICTIONS_FILE)
    assert n == len(table) == 8 and tuple(table.columns) == PREDICTION_COLUMNS
    val = table[table["split"] == "val"]
    assert val["index"].tolist() == RECORD.indices["val"]
    assert val["label"].tolist() == [0, 1, 2, 0] and val["predicted"].tolist() == [0, 1, 1, 0]
    test = table[table["split"] == "test"]
    assert (test["label"] == test["predicted"]).mean() == 0.75
    assert set(table["variant"]) == {"a"}


def test_the_same_evidence_gives_the_same_bytes(tmp_path):
    rows = [trial("a", 0, "done", [0, 1, 1, 0], [2, 1, 2, 0])]
    first, second = tmp_path / "1", tmp_path / "2"
    first.mkdir(), second.mkdir()
    write_predictions(first, rows, RECORD)
    write_predictions(second, rows, RECORD)
    one, two = ((p / PREDICTIONS_FILE).read_bytes() for p in (first, second))
    assert one == two
    with gzip.open(first / PREDICTIONS_FILE) as fh:  # a gzip member with no timestamp
        assert fh.read().startswith(",".join(PREDICTION_COLUMNS).encode())
    assert one[4:8] == b"\0\0\0\0"  # MTIME, RFC 1952 §2.3.1


def test_trials_and_curves_are_written_with_their_columns(tmp_path):
    rows = [dict.fromkeys(TRIAL_COLUMNS, None) | {"variant": "a", "seed": 0, "status": "done"}]
    curves = [dict(zip(CURVE_COLUMNS, ("a", 0, 1, 2.0, 1.5, 0.5, 3.0), strict=True))]
    write_trial_tables(tmp_path, rows, curves)
    trials = pd.read_csv(tmp_path / TRIALS_FILE)
    assert tuple(trials.columns) == TRIAL_COLUMNS and trials["variant"].tolist() == ["a"]
    read = pd.read_csv(tmp_path / CURVES_FILE)
    assert tuple(read.columns) == CURVE_COLUMNS and read["val_acc"].tolist() == [0.5]
