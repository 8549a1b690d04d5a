"""Several processes share one search study: the budget stays exact, no network is trained to
the end twice, and a process killed mid-training leaves a trial the others re-propose.

The processes run `kablate.trials.search.search_front` on a synthetic objective (no training);
they are started as `kablate run` starts its workers (``multiprocessing``, spawn)."""

from __future__ import annotations

import multiprocessing as mp
from collections import Counter

import optuna
import pytest
from optuna.trial import TrialState

from kablate.trials.search import EVALUATED, INTERRUPTED, read_result, search_front, search_study
from kablate.trials.search_claim import SURPLUS, TICKET, issue_tickets
from kablate.trials.store import open_storage
from tests.trials.search_workers import CHOICES, STUDY, screen, search_worker, trained_keys

BUDGET = 10  # of the 27 plans


def run_workers(folder, url, *die_at: int, seconds: float = 0.2) -> list[int]:
    """Start one search process per ``die_at`` (0: it lives) and wait; their exit codes."""
    ctx = mp.get_context("spawn")
    procs = [
        ctx.Process(target=search_worker, args=(str(folder), url, BUDGET, seconds, n))
        for n in die_at
    ]
    for proc in procs:
        proc.start()
    for proc in procs:
        proc.join(timeout=240)
    return [proc.exitcode for proc in procs]


def load(folder, url) -> optuna.Study:
    return optuna.load_study(study_name=STUDY, storage=open_storage(folder, url))


def check_budget_kept(folder, url) -> optuna.Study:
    """Exactly the budget evaluated, once each, by Optuna's own count of the study's states;
    and every plan trained to the end is one of them, once."""
    study = load(folder, url)
    complete = study.get_trials(states=(TrialState.COMPLETE,))
    assert len(complete) == BUDGET
    keys = [t.user_attrs["key"] for t in complete]
    assert len(set(keys)) == BUDGET
    assert sorted(trained_keys(folder)) == sorted(keys)  # nothing trained to the end twice
    # one evaluated trial per budget slot
    assert sorted(t.user_attrs[TICKET] for t in complete) == list(range(BUDGET))
    assert not study.get_trials(states=(TrialState.RUNNING,))
    return study


@pytest.mark.parametrize(
    "storage", ["journal", pytest.param("postgres", marks=pytest.mark.postgres)]
)
def test_processes_share_one_search_and_its_budget(tmp_path, storage, request):
    url = request.getfixturevalue("postgres_url") if storage == "postgres" else None
    assert run_workers(tmp_path, url, 0, 0, 0) == [0, 0, 0]
    study = check_budget_kept(tmp_path, url)
    # every process trained some: they shared the work rather than one doing it all
    assert len(list(tmp_path.glob("trained-*"))) == 3
    outcomes = Counter(t.user_attrs.get("outcome") for t in study.trials if t.state.is_finished())
    assert outcomes[EVALUATED] == BUDGET and set(outcomes) <= {EVALUATED, "repeat", SURPLUS}


def test_a_search_process_killed_mid_training_is_recovered_and_nothing_trains_twice(tmp_path):
    # the second process is killed halfway through its second plan; the others go on
    assert run_workers(tmp_path, None, 0, 2) == [0, -9]
    study = check_budget_kept(tmp_path, None)
    cut = [t for t in study.trials if t.user_attrs.get("outcome") == INTERRUPTED]
    assert len(cut) == 1 and cut[0].state == TrialState.FAIL
    result = read_result(study, CHOICES, BUDGET)
    assert [c.number for c in result.candidates if c.outcome == INTERRUPTED] == [cut[0].number]

    # the same search again (a resumed run) finds its budget spent and trains nothing
    before = len(study.trials)
    assert run_workers(tmp_path, None, 0) == [0]
    assert len(load(tmp_path, None).trials) == before
    check_budget_kept(tmp_path, None)


def test_a_slot_issued_twice_is_evaluated_once(tmp_path):
    """Two runners that start at once on PostgreSQL may both issue every free slot; the trial
    with the lower number keeps each slot, and the other is given back untrained."""
    study = search_study(0, 4, storage=open_storage(tmp_path, None), study_name=STUDY)
    assert issue_tickets(study, BUDGET, ()) == BUDGET
    assert issue_tickets(study, BUDGET, ()) == 0  # every slot is held
    for slot in range(BUDGET):  # what the other runner, which read the study empty, enqueues
        study.enqueue_trial({}, user_attrs={TICKET: slot})
    trained = []
    search_front(CHOICES, screen, lambda p: trained.append(p) or 0.9, BUDGET, study=study)
    assert len(trained) == BUDGET
    given_back = [t for t in study.trials if t.user_attrs.get("outcome") == SURPLUS]
    # a duplicate popped after its slot's first proposal was a repeat keeps the slot instead
    assert 0 < len(given_back) <= BUDGET and all("key" not in t.user_attrs for t in given_back)
