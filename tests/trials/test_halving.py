"""Successive halving in the study (trials/halving.py): the judge stops the trials that
Optuna's own SuccessiveHalvingPruner prunes, on synthetic learning curves (no training), on the
journal file and on PostgreSQL; a job's decision survives a resume; seeds compete apart."""

from __future__ import annotations

import numpy as np
import optuna
import pytest
from optuna.trial import TrialState

from kablate.spec.schema import HalvingSpec
from kablate.trials.halving import RULE_ATTR, halving_rule, judge_for
from kablate.trials.jobs import Job
from kablate.trials.queue import requeue
from kablate.trials.store import open_study

optuna.logging.set_verbosity(optuna.logging.WARNING)


def curves(seed: int, n_trials: int, epochs: int) -> list[list[float]]:
    """Rising validation accuracies with noise, on a 1/200 grid so that ties occur."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n_trials):
        ceiling, rate = rng.uniform(0.5, 0.95), rng.uniform(0.1, 1.0)
        e = np.arange(1, epochs + 1)
        values = ceiling * (1 - np.exp(-rate * e)) + rng.normal(0, 0.02, epochs)
        out.append([round(float(v) * 200) / 200 for v in np.clip(values, 0, 1)])
    return out


def optuna_stops(values: list[list[float]], first: int, factor: int) -> list[int | None]:
    """The step at which Optuna 5.0's SuccessiveHalvingPruner prunes each trial, run one after
    another on a single-objective study (the reference implementation)."""
    pruner = optuna.pruners.SuccessiveHalvingPruner(
        min_resource=first, reduction_factor=factor, min_early_stopping_rate=0, bootstrap_count=0
    )
    study = optuna.create_study(direction="maximize", pruner=pruner)
    out = []
    for curve in values:
        trial, stop = study.ask(), None
        for step, value in enumerate(curve, start=1):
            trial.report(value, step)
            if trial.should_prune():
                stop = step
                break
        study.tell(trial, state=TrialState.PRUNED) if stop else study.tell(trial, curve[-1])
        out.append(stop)
    return out


def start(study: optuna.Study, first: int, factor: int, epochs: int) -> None:
    study.set_user_attr(RULE_ATTR, halving_rule(HalvingSpec(True, first, factor), epochs))


def run_job(
    study: optuna.Study, job: Job, curve: list[float], baseline: str | None = None
) -> int | None:
    """Claim ``job``'s trial, feed its curve to the judge epoch by epoch; the stopping epoch."""
    requeue(study, job)
    trial = study.ask()  # pops the waiting trial just queued (DEVELOPERS.md: Optuna 5.0)
    judge = judge_for(study, trial, baseline)
    for epoch, value in enumerate(curve, start=1):
        if judge(epoch, value):
            trial.set_user_attr("outcome", "stopped")
            study.tell(trial, state=TrialState.PRUNED)
            return epoch
    study.tell(trial, values=[curve[-1], 1.0])
    return None


@pytest.mark.parametrize(("first", "factor", "epochs"), [(1, 3, 10), (2, 2, 10), (1, 2, 7)])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_the_judge_stops_what_optunas_pruner_prunes(storage, tmp_path, first, factor, epochs, seed):
    # The reference: optuna.pruners.SuccessiveHalvingPruner (Optuna 5.0), fed the same values
    # in the same order. The epochs are chosen so that the last one is no rung: Optuna would
    # also judge a trial at its last step, where we have nothing left to save.
    values = curves(seed, 14, epochs)
    study = open_study("halving", tmp_path, storage)
    start(study, first, factor, epochs)
    ours = [run_job(study, Job(f"v{i}", f"plan{i}", 0), c) for i, c in enumerate(values)]
    theirs = optuna_stops(values, first, factor)
    assert ours == theirs
    assert any(ours) and not all(ours)  # the curves exercise both outcomes


def test_a_resumed_job_keeps_its_decision(tmp_path):
    study = open_study("halving", tmp_path, None)
    start(study, 1, 2, 4)
    assert run_job(study, Job("va", "a", 0), [0.8, 0.8, 0.8, 0.8]) is None
    assert run_job(study, Job("vb", "b", 0), [0.5, 0.5, 0.5, 0.5]) == 1
    # Job b again (as after a kill): with a score that would now go on, it stays stopped.
    assert run_job(study, Job("vb", "b", 0), [0.9, 0.9, 0.9, 0.9]) == 1
    # A job that went on goes on, even against scores that would stop it now.
    assert run_job(study, Job("vc", "c", 0), [0.95, 0.95, 0.95, 0.95]) is None
    assert run_job(study, Job("va", "a", 0), [0.8, 0.8, 0.8, 0.8]) is None
    decided = [t.user_attrs.get("halving-rung-0") for t in study.get_trials()]
    assert [d["kept"] for d in decided if d] == [True, False, True]  # one decision per job


def test_each_seed_competes_on_its_own(tmp_path):
    study = open_study("halving", tmp_path, None)
    start(study, 1, 2, 4)
    assert run_job(study, Job("va", "a", 0), [0.9] * 4) is None
    assert run_job(study, Job("vb", "b", 1), [0.2] * 4) is None  # alone at seed 1: it leads
    assert run_job(study, Job("vc", "c", 1), [0.1] * 4) == 1


def test_the_baseline_is_never_stopped(tmp_path):
    # The report compares every variant with the baseline on every seed, so halving must let
    # it train to the end even when it trails at every rung.
    study = open_study("halving", tmp_path, None)
    start(study, 1, 2, 8)  # rungs after epochs 1, 2 and 4
    assert run_job(study, Job("va", "a", 0), [0.9] * 8, baseline="vbase") is None
    assert run_job(study, Job("vbase", "base", 0), [0.1] * 8, baseline="vbase") is None
    decided = [
        t.user_attrs[f"halving-rung-{k}"]
        for t in study.get_trials()
        if t.user_attrs["variant_id"] == "vbase"
        for k in range(3)
    ]
    assert [d["kept"] for d in decided] == [True] * 3 and decided[0]["n_compared"] == 2
    # The same curve on a variant that is not the baseline stops at the first rung, where it
    # was compared with the baseline's recorded score too.
    assert run_job(study, Job("vb", "b", 0), [0.1] * 8, baseline="vbase") == 1
    (vb,) = [t for t in study.get_trials() if t.user_attrs["variant_id"] == "vb"]
    assert vb.user_attrs["halving-rung-0"]["n_compared"] == 3


def test_no_judge_without_the_rule(tmp_path):
    study = open_study("halving", tmp_path, None)
    requeue(study, Job("va", "a", 0))
    assert judge_for(study, study.ask()) is None


def test_optunas_pruners_refuse_our_two_objective_study(tmp_path):
    # Why trials/halving.py has its own judge: Optuna 5.0 refuses report() and should_prune()
    # on a multi-objective study, and ours maximises accuracy and minimises MACs.
    study = open_study("halving", tmp_path, None)
    assert len(study.directions) == 2
    requeue(study, Job("va", "a", 0))
    trial = study.ask()
    with pytest.raises(NotImplementedError, match="multi-objective"):
        trial.report(0.5, 1)
    with pytest.raises(NotImplementedError, match="multi-objective"):
        trial.should_prune()
