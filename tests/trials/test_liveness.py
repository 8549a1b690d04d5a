"""Both liveness checks keep the one contract that workers and claims rely on (liveness.py)."""

from __future__ import annotations

import time

import pytest
from optuna.trial import TrialState

from kablate.lifecycle import WAITING
from kablate.trials.jobs import Job
from kablate.trials.liveness import HeartbeatLiveness, Liveness, LocalLiveness, liveness_for
from kablate.trials.queue import claim_next, enqueue_missing, job_status, tagged_trials
from kablate.trials.store import HEARTBEAT_ENV, lock_dir, open_study


class FakeHeartbeatStorage:
    """The two calls HeartbeatLiveness makes of Optuna's RDBStorage, recorded."""

    def __init__(self) -> None:
        self.beats: list[int] = []

    def get_heartbeat_interval(self) -> int:
        return 3600  # the thread records none of its own during the test

    def record_heartbeat(self, trial_id: int) -> None:
        self.beats.append(trial_id)


@pytest.fixture(params=["local", "heartbeat"])
def liveness(request, tmp_path):
    if request.param == "local":
        return LocalLiveness(tmp_path / "locks")
    return HeartbeatLiveness(FakeHeartbeatStorage())


def test_each_implementation_has_every_member_of_the_protocol(liveness):
    assert isinstance(liveness, Liveness)
    assert isinstance(liveness.remote, bool) and liveness.interval >= 0


def test_a_free_trial_is_held_started_and_released(liveness):
    token = liveness.hold(7)
    assert token is not None
    liveness.started(None, 7)
    liveness.release(token)
    liveness.release(None)  # a claim that got no token releases nothing
    with liveness.queue_lock():
        pass


def test_the_local_lock_is_exclusive_and_freed_on_release(tmp_path):
    local = LocalLiveness(tmp_path / "locks")
    token = local.hold(3)
    assert LocalLiveness(tmp_path / "locks").hold(3) is None  # another process's view
    local.release(token)
    again = LocalLiveness(tmp_path / "locks").hold(3)
    assert again is not None


def test_the_heartbeat_is_recorded_once_the_claim_won():
    storage = FakeHeartbeatStorage()
    beats = HeartbeatLiveness(storage)
    token = beats.hold(5)
    assert storage.beats == []
    beats.started(None, 5)
    assert storage.beats == [5]  # at once: a trial with no heartbeat row is never stale
    beats.release(token)


def test_an_object_missing_a_member_is_not_a_liveness(tmp_path):
    class NoRecover:
        remote, interval = False, 0.0

        def hold(self, trial_id): ...
        def started(self, study, trial_id): ...
        def release(self, token): ...
        def queue_lock(self): ...

    assert not isinstance(NoRecover(), Liveness)


def abandon_one_of_two(study, liveness) -> tuple[int, int, object]:
    """Claim two jobs; the first's worker then vanishes (its lock or its heartbeats stop), the
    second's stays alive. The two trial numbers, and the live one's token."""
    enqueue_missing(study, [Job("v0", "a", 0), Job("v1", "b", 0)])
    gone, alive = claim_next(study, liveness), claim_next(study, liveness)
    liveness.release(gone.token)  # what the kernel or a stopped beat does when a worker dies
    return gone.trial.number, alive.trial.number, alive.token


def test_the_job_of_a_vanished_worker_is_requeued_once_on_every_storage(
    storage, tmp_path, monkeypatch
):
    # The contract of liveness.Liveness.recover, kept by LocalLiveness (journal file) and
    # HeartbeatLiveness (PostgreSQL) alike.
    monkeypatch.setenv(HEARTBEAT_ENV, "2")  # PostgreSQL: beats every 2 s, stale after 6 s
    study = open_study("live", tmp_path, storage)
    liveness = liveness_for(study, lock_dir(tmp_path, storage))
    gone, alive, token = abandon_one_of_two(study, liveness)
    if liveness.remote:
        time.sleep(3 * liveness.interval + 2)  # past the grace period (store.py)
    liveness.recover(study)
    liveness.recover(study)  # a second check finds nothing left to do
    trials = {t.number: t for t in study.get_trials()}
    assert trials[gone].state == TrialState.FAIL
    assert trials[alive].state == TrialState.RUNNING  # a live worker's trial is left alone
    waiting = [t.user_attrs["job"] for t in trials.values() if t.state == TrialState.WAITING]
    assert waiting == [trials[gone].user_attrs["job"]]  # requeued, and only once
    assert job_status(tagged_trials(study)[waiting[0]])[0] == WAITING
    liveness.release(token)
