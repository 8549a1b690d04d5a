"""Both liveness checks keep the one contract that workers and claims rely on (liveness.py)."""

from __future__ import annotations

import pytest

from kablate.trials.liveness import HeartbeatLiveness, Liveness, LocalLiveness


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
