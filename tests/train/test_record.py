"""A trial's record: it survives a trip through JSON (Python's json module, NaN included),
ignores keys a newer kablate may add, and epochs are shown counted from 1."""

from __future__ import annotations

import json
import math

from kablate.train.record import EpochRecord, TrialRecord, shown_epoch


def test_a_record_survives_json_with_its_curve_and_its_missing_scores():
    record = TrialRecord(
        status="diverged",
        curve=[EpochRecord(0, 2.0, 1.9, 0.3, 1.5), EpochRecord(1, 1.5, 1.4, 0.5, 3.0)],
        score_epoch=1,
        predictions={"val": "eJw="},
        steps=40,
    )
    back = TrialRecord.from_dict(json.loads(json.dumps(record.to_dict())))
    assert back.curve == record.curve and back.status == "diverged" and back.steps == 40
    assert math.isnan(back.val_acc) and math.isnan(back.best_val_acc)  # NaN stays NaN
    assert back.predictions == {"val": "eJw="} and back.score_epoch == 1


def test_keys_it_does_not_know_are_ignored():
    back = TrialRecord.from_dict({"val_acc": 0.9, "from_a_newer_kablate": 1})
    assert back.val_acc == 0.9 and back.curve == [] and back.status == "done"


def test_epochs_are_shown_from_one_and_none_stays_none():
    assert [shown_epoch(e) for e in (0, 4, -1, None)] == [1, 5, None, None]
