"""Trials read back out of storage as the rows of trials.csv and curves.csv: one row per
planned (variant, seed), the attempt that speaks for each job, and epochs counted from 1.

The study is an in-memory Optuna study whose trials are added with `optuna.trial.create_trial`
(Optuna's documented way to add finished trials), tagged as the workers tag them."""

from __future__ import annotations

import optuna
from optuna.trial import TrialState, create_trial

from kablate.lifecycle import DIVERGED, DONE, MISSING
from kablate.results.columns import CURVE_COLUMNS, TRIAL_COLUMNS
from kablate.trials.jobs import Job
from kablate.trials.rows import collect_trials

PLAN = {
    "seeds": [0, 1],
    "variants": [
        {"id": "v0", "name": "all-3", "params": 100, "macs": 1000, "rf": 9},
        {"id": "v1", "name": "stem-5", "params": 120, "macs": 1400, "rf": 11},
    ],
}


def add(study, variant_id, name, seed, state, value=None, **attrs) -> None:
    job = Job(variant_id, name, seed)
    study.add_trial(
        create_trial(
            state=state,
            value=value,
            user_attrs={**job.attrs(), **attrs},
            distributions={},
            params={},
        )
    )


def study_with_trials() -> optuna.Study:
    study = optuna.create_study()
    curve = [[0, 2.0, 1.5, 0.5, 3.0], [1, 1.0, 0.9, 0.8, 6.0]]  # epoch counted from 0
    # all-3 seed 0: done at once, with its curve and predictions
    scores = {"val_acc": 0.8, "test_acc": 0.7, "score_epoch": 1, "best_epoch": -1}
    add(study, "v0", "all-3", 0, TrialState.COMPLETE, 0.8, **scores, worker="w1", curve=curve,
        predictions={"val": "x"})  # fmt: skip
    # all-3 seed 1: failed once, then done on its second attempt
    add(study, "v0", "all-3", 1, TrialState.FAIL, worker="w1")
    add(study, "v0", "all-3", 1, TrialState.COMPLETE, 0.75, val_acc=0.75, worker="w2")
    # stem-5 seed 0: diverged; stem-5 seed 1: never enqueued
    add(study, "v1", "stem-5", 0, TrialState.FAIL, outcome=DIVERGED)
    return study


def test_there_is_a_row_per_planned_trial_in_seed_then_plan_order():
    rows, _ = collect_trials(study_with_trials(), PLAN)
    assert [(r["variant"], r["seed"]) for r in rows] == [
        ("all-3", 0),
        ("stem-5", 0),
        ("all-3", 1),
        ("stem-5", 1),
    ]
    assert [r["status"] for r in rows] == [DONE, DIVERGED, DONE, MISSING]
    assert all(set(TRIAL_COLUMNS) <= set(r) for r in rows)
    assert [(r["params"], r["macs"], r["rf"]) for r in rows[:2]] == [
        (100, 1000, 9),
        (120, 1400, 11),
    ]


def test_the_attempt_that_speaks_for_a_job_gives_its_figures():
    rows, _ = collect_trials(study_with_trials(), PLAN)
    first, retried = rows[0], rows[2]
    assert (first["val_acc"], first["test_acc"], first["worker"]) == (0.8, 0.7, "w1")
    assert (first["score_epoch"], first["best_epoch"]) == (2, None)  # counted from 1; none
    assert first["predictions"] == {"val": "x"} and first["n_attempts"] == 1
    assert (retried["val_acc"], retried["worker"], retried["n_attempts"]) == (0.75, "w2", 2)
    assert retried["trial"] == 2  # the second attempt's trial number
    assert rows[3]["n_attempts"] == 0 and rows[3]["predictions"] == {}


def test_curves_have_a_row_per_epoch_counted_from_one():
    _, curves = collect_trials(study_with_trials(), PLAN)
    assert curves == [
        dict(zip(CURVE_COLUMNS, ("all-3", 0, 1, 2.0, 1.5, 0.5, 3.0), strict=True)),
        dict(zip(CURVE_COLUMNS, ("all-3", 0, 2, 1.0, 0.9, 0.8, 6.0), strict=True)),
    ]
