"""Successive halving in the study (trials/halving.py): the judge stops the trials that
Optuna's own SuccessiveHalvingPruner prunes, on synthetic learning curves (no training), on the
journal file and on PostgreSQL; a job's decision survives a resume; seeds compete apart; the
baseline is never stopped; a stopped variant's other seeds are withdrawn, never claimed, never
enqueued again, and listed in trials.csv's rows as retired."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import numpy as np
import optuna
import pytest
from optuna.trial import TrialState

from kablate.lifecycle import RETIRED, STOPPED
from kablate.spec.schema import HalvingSpec
from kablate.trials.halving import RULE_ATTR, halving_rule, judge_for
from kablate.trials.jobs import Job
from kablate.trials.liveness import liveness_for
from kablate.trials.queue import (
    Claim,
    claim_next,
    enqueue_missing,
    requeue,
    trial_status,
    withdraw,
    withdraw_halted,
)
from kablate.trials.rows import collect_trials
from kablate.trials.store import lock_dir, open_study
from tests.trials.runs import run_at_once

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


# Two variants x two seeds, claimed seed-major as the runner orders them.
JOBS_2X2 = [Job(v, v, seed) for seed in (0, 1) for v in ("va", "vb")]
PLAN_2X2 = {
    "seeds": [0, 1],
    "variants": [{"id": v, "name": v, "params": 1, "macs": 1, "rf": 3} for v in ("va", "vb")],
}


def train_claimed(study: optuna.Study, claim: Claim, curve: list[float], liveness) -> None:
    """What a worker does with a claimed trial (worker.py), on a synthetic curve."""
    judge = judge_for(study, claim.trial)
    for epoch, value in enumerate(curve, start=1):
        if judge(epoch, value):
            claim.trial.set_user_attr("outcome", STOPPED)
            study.tell(claim.trial, state=TrialState.PRUNED)
            withdraw_halted(study, liveness)
            break
    else:
        study.tell(claim.trial, values=[curve[-1], 1.0])
    liveness.release(claim.token)


def job_states(study: optuna.Study) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for t in study.get_trials():
        out.setdefault(t.user_attrs["job"], []).append(trial_status(t))
    return out


def test_a_stopped_variant_gets_no_more_seeds(storage, tmp_path):
    study = open_study("halving", tmp_path, storage)
    liveness = liveness_for(study, lock_dir(tmp_path, storage))
    start(study, 1, 2, 4)
    assert enqueue_missing(study, JOBS_2X2) == 4
    order = {job.key: i for i, job in enumerate(JOBS_2X2)}
    train_claimed(study, claim_next(study, liveness, order), [0.9] * 4, liveness)  # va-s0
    train_claimed(study, claim_next(study, liveness, order), [0.2] * 4, liveness)  # vb-s0
    # vb stopped on seed 0: its seed-1 trial was withdrawn, and only va-s1 is left to claim.
    assert job_states(study)["vb-s0"] == [STOPPED]
    assert job_states(study)["vb-s1"] == [RETIRED]
    (withdrawn,) = [t for t in study.get_trials() if t.user_attrs["job"] == "vb-s1"]
    assert withdrawn.user_attrs["retired_why"] == STOPPED
    assert withdrawn.user_attrs["retired_after"] == 0
    claim = claim_next(study, liveness, order)
    assert claim.key == "va-s1"
    train_claimed(study, claim, [0.9] * 4, liveness)
    assert claim_next(study, liveness, order) is None
    # A rerun enqueues nothing for vb; trials.csv lists vb-s1 as not run after seed 0.
    assert enqueue_missing(study, JOBS_2X2) == 0
    rows = {(r["variant_id"], r["seed"]): r for r in collect_trials(study, PLAN_2X2)[0]}
    assert rows["vb", 1]["status"] == RETIRED
    assert (rows["vb", 1]["retired_why"], rows["vb", 1]["retired_after"]) == (STOPPED, 0)
    assert rows["vb", 0]["status"] == STOPPED and rows["va", 1]["retired_why"] is None


def stop_vb_on_seed_0(tmp_path, storage):
    """A study where va went on and vb stopped on seed 0, with nothing else queued."""
    study = open_study("halving", tmp_path, storage)
    liveness = liveness_for(study, lock_dir(tmp_path, storage))
    start(study, 1, 2, 4)
    enqueue_missing(study, JOBS_2X2[:2])
    train_claimed(study, claim_next(study, liveness), [0.9] * 4, liveness)
    train_claimed(study, claim_next(study, liveness), [0.2] * 4, liveness)
    assert job_states(study)["vb-s0"] == [STOPPED]
    return study, liveness


def test_a_claim_that_wins_a_stopped_variants_trial_withdraws_it(storage, tmp_path):
    # A runner that read the queue before the stop may still enqueue the variant's next seed;
    # the claim, which looks again after its compare-and-set, must not train it.
    study, liveness = stop_vb_on_seed_0(tmp_path, storage)
    requeue(study, Job("vb", "vb", 1))  # as that runner would
    assert claim_next(study, liveness) is None
    assert job_states(study)["vb-s1"] == [RETIRED]


def test_with_halving_off_a_stopped_variants_seeds_run(tmp_path):
    study, liveness = stop_vb_on_seed_0(tmp_path, None)
    assert enqueue_missing(study, JOBS_2X2) == 1  # va-s1 only
    study.set_user_attr(RULE_ATTR, None)  # a run with halving off (halving.start_halving)
    assert enqueue_missing(study, JOBS_2X2) == 1  # now vb-s1 too


N_CONTESTED = 120


def claim_or_withdraw(folder: str, url: str | None, role: str, out: str, go) -> None:
    """A claimer (claim, tell done, repeat) or a withdrawer (withdraw every waiting trial of
    variant vx, repeat), until nothing waits; a claimer writes the job keys it took."""
    study = open_study("contested", Path(folder), url)
    liveness = liveness_for(study, lock_dir(Path(folder), url))
    go.wait()
    taken = []
    if role == "claim":
        while (claim := claim_next(study, liveness)) is not None:
            taken.append(claim.key)
            study.tell(claim.trial, values=[0.5, 1.0])
            liveness.release(claim.token)
    else:
        while study.get_trials(deepcopy=False, states=(TrialState.WAITING,)):
            withdraw(study, liveness, {"vx": {"retired_why": STOPPED}})
    Path(out).write_text("\n".join(taken))


@pytest.mark.slow
def test_claims_and_withdrawals_racing_each_other_take_each_trial_once(storage, tmp_path):
    # Two processes claim and two withdraw the same waiting trials at once: each trial must
    # end exactly once, either trained (claimed) or retired, never both (a withdrawal that
    # skipped the compare-and-set would retire a claimed trial, and its claimer's tell fail).
    study = open_study("contested", tmp_path, storage)
    jobs = [Job("vx", "x", seed) for seed in range(N_CONTESTED)]
    assert enqueue_missing(study, jobs) == N_CONTESTED
    roles = ["claim", "withdraw", "claim", "withdraw"]
    outs = [tmp_path / f"taken-{i}.txt" for i in range(len(roles))]
    run_at_once(
        claim_or_withdraw,
        [(str(tmp_path), storage, role, str(out)) for role, out in zip(roles, outs, strict=True)],
    )
    claimed = Counter(key for out in outs for key in out.read_text().split())
    trials = study.get_trials(deepcopy=False)
    assert len(trials) == N_CONTESTED
    done = {t.user_attrs["job"] for t in trials if t.state == TrialState.COMPLETE}
    retired = {t.user_attrs["job"] for t in trials if trial_status(t) == RETIRED}
    assert all(n == 1 for n in claimed.values()) and set(claimed) == done
    assert not done & retired and len(done) + len(retired) == N_CONTESTED
    assert done and retired  # both sides really took trials
