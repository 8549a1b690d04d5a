"""Claiming: every enqueued trial is handed to exactly one worker, on every storage.

The load test enqueues 200 tagged trials and lets 4 processes claim and finish them as fast as
they can (no training: the claim is what is under test). RDB on SQLite without our per-trial
lock hands some trials to two workers (Optuna's FAQ advises against SQLite for parallel work;
tests/bench/bench_claim.py shows it), so SQLite is in the list on purpose.
"""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import optuna
import pytest
from optuna.trial import TrialState

from kablate.trials.jobs import Job
from kablate.trials.liveness import liveness_for
from kablate.trials.queue import claim_next, enqueue_missing
from kablate.trials.store import lock_dir, open_study
from tests.trials.runs import run_at_once

N_TRIALS, N_PROCESSES = 200, 4


def claim_until_empty(name: str, folder: str, url: str | None, out: str, go) -> None:
    """A worker without training: claim, tell, repeat; write the claimed job keys."""
    folder_path = Path(folder)
    study = open_study(name, folder_path, url)
    liveness = liveness_for(study, lock_dir(folder_path, url))
    go.wait()
    claimed = []
    while (claim := claim_next(study, liveness)) is not None:
        claimed.append(claim.key)
        study.tell(claim.trial, values=[0.5, 1.0])
        liveness.release(claim.token)
    Path(out).write_text("\n".join(claimed))


@pytest.fixture(params=["journal", "sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def any_storage(request, tmp_path) -> str | None:
    if request.param == "journal":
        return None
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path / 'study.db'}"
    return request.getfixturevalue("postgres_url")


@pytest.mark.slow
def test_200_trials_and_4_processes_claim_each_trial_exactly_once(storage, tmp_path):
    # The default journal file and PostgreSQL; SQLite is slower to load (each claim reads the
    # study through SQLAlchemy) and is measured in tests/bench/bench_claim.py instead.
    any_storage = storage
    study = open_study("claims", tmp_path, any_storage)
    jobs = [Job(f"v{i:03d}", f"plan{i}", 0) for i in range(N_TRIALS)]
    assert enqueue_missing(study, jobs) == N_TRIALS
    outs = [tmp_path / f"claimed-{i}.txt" for i in range(N_PROCESSES)]
    run_at_once(
        claim_until_empty, [("claims", str(tmp_path), any_storage, str(out)) for out in outs]
    )
    claimed = Counter(key for out in outs for key in out.read_text().split())
    assert set(claimed) == {job.key for job in jobs}  # none lost
    assert [k for k, n in claimed.items() if n > 1] == []  # none twice
    trials = study.get_trials(deepcopy=False)
    assert len(trials) == N_TRIALS  # ask() never ran, so no untagged trial was made
    assert all(t.state == TrialState.COMPLETE for t in trials)
    assert sum(1 for out in outs if out.read_text()) >= 2  # the work really was shared


def test_optuna_ask_invents_a_trial_once_the_queue_is_empty(tmp_path):
    # The Optuna 5.0 behaviour the queue works around (DEVELOPERS.md, "Trials and storage").
    study = open_study("ask", tmp_path, None)
    enqueue_missing(study, [Job("v1", "a", 0)])
    first = study.ask()
    assert first.user_attrs["job"] == "v1-s0"
    second = study.ask()
    assert "job" not in second.user_attrs  # a fresh, untagged trial


def test_claim_next_returns_none_on_an_empty_queue_and_makes_no_trial(tmp_path):
    study = open_study("empty", tmp_path, None)
    liveness = liveness_for(study, lock_dir(tmp_path, None))
    enqueue_missing(study, [Job("v1", "a", 0)])
    claim = claim_next(study, liveness)
    assert claim is not None and claim.key == "v1-s0"
    assert claim_next(study, liveness) is None
    assert len(study.get_trials()) == 1


def test_storage_compare_and_set_refuses_a_second_claim(any_storage, tmp_path):
    # BaseStorage.set_trial_state_values documents False for RUNNING → RUNNING; the claim
    # relies on it.
    study = open_study("cas", tmp_path, any_storage)
    enqueue_missing(study, [Job("v1", "a", 0)])
    trial_id = study.get_trials()[0]._trial_id
    storage = optuna.load_study(study_name="cas", storage=study._storage)._storage
    assert storage.set_trial_state_values(trial_id, TrialState.RUNNING) is True
    assert storage.set_trial_state_values(trial_id, TrialState.RUNNING) is False


def test_a_duplicate_job_trains_once(tmp_path):
    # Two runners on a shared server may both enqueue a missing job: only the lower-numbered
    # trial trains, the other is told FAIL as a duplicate.
    study = open_study("dup", tmp_path, None)
    liveness = liveness_for(study, lock_dir(tmp_path, None))
    job = Job("v1", "a", 0)
    study.enqueue_trial({}, user_attrs=job.attrs())
    study.enqueue_trial({}, user_attrs=job.attrs())
    first = claim_next(study, liveness)
    assert first is not None and first.trial.number == 0
    assert claim_next(study, liveness) is None  # trial 1 was claimed and refused
    states = [(t.state, t.user_attrs.get("outcome")) for t in study.get_trials()]
    assert states == [(TrialState.RUNNING, None), (TrialState.FAIL, "duplicate")]
