"""The evidence: per (variant, seed, image) predictions decoded from storage and scored
against data.json's labels, on the seeds every compared variant finished (hand-worked)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from kablate.analysis.evidence import gather_evidence
from kablate.errors import KablateError
from kablate.results.evidence import encode_predictions
from tests.analysis.synthetic import data_json

LABELS = [0, 1, 2, 0, 1]


def record():
    return data_json(n_images=len(LABELS), n_classes=3)  # labels 0, 1, 2, 0, 1


def row(variant: str, seed: int, val: list[int] | None, status: str = "done") -> dict:
    predictions = {"val": encode_predictions(np.array(val))} if val is not None else None
    return {
        "variant": variant,
        "variant_id": f"id-{variant}",
        "seed": seed,
        "status": status,
        "predictions": predictions,
    }


def test_correctness_is_each_prediction_against_its_label_on_the_shared_seeds():
    trials = pd.DataFrame(
        [
            row("a", 0, [0, 1, 2, 0, 1]),  # 5 of 5
            row("a", 1, [0, 0, 2, 0, 0]),  # 3 of 5
            row("b", 0, [1, 1, 1, 1, 1]),  # 2 of 5
            row("b", 1, [0, 1, 2, 2, 2]),  # 3 of 5
            row("b", 2, [0, 1, 2, 0, 1]),  # seed 2: only b has it, so it is left out
            row("c", 0, None, status="running"),
        ]
    )
    ev = gather_evidence(trials, record(), None)
    assert ev.names == ("a", "b") and ev.seeds == (0, 1)
    assert ev.n_correct.tolist() == [8, 5]
    assert ev.accuracy.tolist() == [0.8, 0.5]
    assert ev.correct[1, 0].tolist() == [False, True, False, False, True]
    assert ev.predicted[0, 1].tolist() == [0, 0, 2, 0, 0]
    assert ev.labels.tolist() == LABELS


def test_given_seeds_leave_out_a_variant_that_lacks_one():
    trials = pd.DataFrame([row("a", 0, [0, 1, 2, 0, 1]), row("b", 1, [0, 1, 2, 0, 1])])
    ev = gather_evidence(trials, record(), [0])
    assert ev.names == ("a",) and ev.n_correct.tolist() == [5]
    assert gather_evidence(trials[trials.status == "waiting"], record(), None) is None


def test_a_prediction_count_that_is_not_the_splits_size_is_refused():
    trials = pd.DataFrame([row("a", 0, [0, 1, 2])])
    with pytest.raises(KablateError, match="predicted 3 val images, but data.json lists 5"):
        gather_evidence(trials, record(), None)


def test_a_finished_trial_without_predictions_is_refused():
    trials = pd.DataFrame([row("a", 0, None)])
    with pytest.raises(KablateError, match="has no stored val predictions"):
        gather_evidence(trials, record(), None)
