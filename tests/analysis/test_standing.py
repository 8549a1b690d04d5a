"""The standing of a partial sweep (what `kablate status` shows): the same leader and
accuracies as the report's analysis of the same rows, marked provisional while trials are
missing, with JSON-safe numbers and a note that says why there is no leader yet.

Synthetic rows (tests/analysis/synthetic.py); the slow end-to-end check on a real partial
sweep is tests/trials/test_status.py."""

from __future__ import annotations

import json

import pytest

from kablate.analysis.standing import stand
from kablate.analysis.summary import analyze
from kablate.spec.schema import PickSpec
from tests.analysis.synthetic import data_json, plan, rows, with_predictions


def test_the_standing_agrees_with_the_analysis_and_is_provisional_while_trials_miss():
    trials, pick = with_predictions(rows()), PickSpec(margin=2.0)
    standing = stand(trials, [], plan(), [], data_json(), pick)
    analysis = analyze(trials, [], plan(), [], data_json(), pick)
    assert standing.leader == analysis.recommended is not None
    assert standing.provisional and standing.n_missing == analysis.n_missing > 0
    assert standing.seeds == analysis.seeds
    mine = {v["variant"]: v for v in standing.variants}
    for r in analysis.variants.to_dict("records"):
        assert mine[r["variant"]]["n_seeds"] == r["n_seeds"]
        if r["n_seeds"]:
            assert mine[r["variant"]]["val_acc_mean"] == pytest.approx(r["val_acc_mean"])
    assert mine["never"]["val_acc_mean"] is None  # NaN becomes null
    json.dumps(standing.variants, allow_nan=False)  # raises on any NaN left
    assert "shown to lose less than 2 pp against the baseline base" in standing.note


def test_without_a_finished_baseline_there_is_no_leader_and_the_note_says_why():
    trials = with_predictions(rows())
    for row in trials:
        if row["variant"] == "base":
            row.update(status="running", val_acc=None, test_acc=None, predictions=None)
    standing = stand(trials, [], plan(), [], data_json(), PickSpec())
    assert standing.leader is None and standing.stability is None
    assert standing.note == (
        "no leader yet: the baseline base has no finished trial, and the margin rule compares "
        "every plan with it"
    )
    waiting = [dict(r, status="waiting") for r in rows()]
    assert stand(waiting, [], plan(), [], data_json(), PickSpec()).note == (
        "no leader yet: no trial has finished"
    )
