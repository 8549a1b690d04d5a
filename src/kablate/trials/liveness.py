"""Whether the worker of a running trial is still alive, and recovery of abandoned trials.

A worker that dies (SIGKILL, a crash, power loss) leaves its trial RUNNING in storage. Before
every claim, and when a run starts, workers look for such trials, fail them and put their
jobs back in the queue; the rerun resumes from the trial's last checkpoint.

Two implementations, one per kind of storage:

- `LocalLiveness` (journal file, SQLite: one machine). Each running trial holds an exclusive
  ``flock`` on ``locks/trial-<id>.lock``, taken *before* the trial is claimed and released
  after it is told. The kernel drops a flock when its process dies, so a RUNNING trial whose
  lock can be taken has no live worker: no clocks, no timeouts, detected at once. The lock also
  makes the compare-and-set of the claim exclusive among local processes, which RDB on SQLite
  does not do on its own (it ignores ``SELECT ... FOR UPDATE``).
- `HeartbeatLiveness` (PostgreSQL: several machines). Optuna's heartbeat: the worker records
  one every interval from a thread; `optuna.storages.fail_stale_trials` fails trials whose
  last heartbeat (server clock) is older than the grace period, and the storage's callback
  requeues the job (queue.requeue_lost). The states and moves are lifecycle.py's.
"""

from __future__ import annotations

import fcntl
import logging
import os
import socket
import threading
from collections.abc import Iterator
from contextlib import AbstractContextManager, contextmanager, nullcontext
from datetime import datetime
from pathlib import Path
from typing import Protocol, runtime_checkable

import optuna
from optuna.exceptions import UpdateFinishedTrialError
from optuna.trial import FrozenTrial, TrialState

from kablate.trials.queue import requeue_lost

log = logging.getLogger("kablate")


WORKER = "worker"  # a trial's user attribute naming the process that runs it (`process_name`)


def process_name(pid: int | None = None) -> str:
    """How a trial names the process that runs it: ``host:pid`` (this process by default)."""
    return f"{socket.gethostname()}:{os.getpid() if pid is None else pid}"


def process_alive(name: str) -> bool | None:
    """Whether the process a trial names (`process_name`) is running; None when it runs on
    another machine, or the name is not one of ours. Read-only: a reader such as `status` must
    not take a trial's lock, which a claim may be about to take. A pid the system has given to
    a new process since reads as alive (rare: pids are reused only after the range wraps)."""
    host, _, pid = name.rpartition(":")
    if host != socket.gethostname() or not pid.isdigit():
        return None
    try:
        os.kill(int(pid), 0)  # signal 0: only checks that the process exists
    except ProcessLookupError:
        return False
    except PermissionError:  # it exists, under another user: alive all the same
        pass
    return True


def running_since(trial: FrozenTrial, now: datetime) -> dict:
    """When a running trial was claimed (``started``, ISO) and for how many ``seconds`` it has
    run at ``now`` (naive local time, as Optuna's); both None when it has no start."""
    start = trial.datetime_start
    return {
        "started": start.isoformat(timespec="seconds") if start else None,
        "seconds": round((now - start).total_seconds(), 1) if start else None,
    }


@contextmanager
def host_lock(path: Path) -> Iterator[None]:
    """An exclusive flock on ``path`` among the processes of this machine (blocks)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        fcntl.flock(fd, fcntl.LOCK_UN)
        os.close(fd)


@runtime_checkable
class Liveness(Protocol):
    """What a worker, the claim and the runner ask of a liveness check (lifecycle.py).

    - `hold` before the compare-and-set of a claim: a token, or None when another live process
      holds that trial (then the claim passes it by); `release` the token once the trial is
      told, or when the claim lost.
    - `started` once the claim won: from then on the trial counts as alive while its worker is.
    - `recover` before every claim: fail each RUNNING trial whose worker is gone, as lost, and
      requeue its job (`queue.requeue_lost`), once across all processes.
    - `queue_lock` while enqueueing, recovering or deciding a race round.
    - ``remote``: whether other machines share the study (an idle worker then waits, every
      ``interval`` seconds, for trials running elsewhere).
    """

    remote: bool
    interval: float

    def hold(self, trial_id: int) -> int | None: ...

    def started(self, study: optuna.Study, trial_id: int) -> None: ...

    def release(self, token: int | None) -> None: ...

    def recover(self, study: optuna.Study) -> object: ...

    def queue_lock(self) -> AbstractContextManager: ...


class LocalLiveness:
    remote = False
    interval = 0.0  # not remote: nothing to wait for

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)

    def hold(self, trial_id: int) -> int | None:
        """Take the trial's lock without waiting; a token, or None if someone holds it."""
        fd = os.open(self.folder / f"trial-{trial_id}.lock", os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            return None
        return fd

    def started(self, study: optuna.Study, trial_id: int) -> None:
        """Nothing to do: the lock taken by `hold` is the sign of life."""

    def queue_lock(self):
        """Held while enqueueing and recovering, so that two local runners never both do."""
        return host_lock(self.folder / "queue.lock")

    def release(self, token: int | None) -> None:
        if token is not None:
            fcntl.flock(token, fcntl.LOCK_UN)
            os.close(token)

    def is_alive(self, trial_id: int) -> bool:
        token = self.hold(trial_id)
        self.release(token)
        return token is None

    def recover(self, study: optuna.Study) -> list[str]:
        """Fail every RUNNING trial without a live worker and requeue its job; the job keys."""
        storage = study._storage  # noqa: SLF001 (trial ids are only reachable here)
        with self.queue_lock():
            return self._recover(study, storage)

    def _recover(self, study: optuna.Study, storage) -> list[str]:
        recovered = []
        for trial in study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)):
            token = self.hold(trial._trial_id)
            if token is None:
                continue  # its worker is alive
            try:
                # Re-read under the lock: the worker may have told the trial and let go of the
                # lock since the list above was read.
                current = storage.get_trial(trial._trial_id)
                if current.state != TrialState.RUNNING:
                    continue
                try:
                    storage.set_trial_user_attr(trial._trial_id, "outcome", "worker-lost")
                    storage.set_trial_state_values(trial._trial_id, TrialState.FAIL)
                except UpdateFinishedTrialError:
                    continue
                requeue_lost(study, current)
                recovered.append(current.user_attrs.get("job", ""))
            finally:
                self.release(token)
        return recovered


class _Beat(threading.Thread):
    def __init__(self, storage, trial_id: int, interval: float) -> None:
        super().__init__(daemon=True, name=f"heartbeat-{trial_id}")
        self.storage, self.trial_id, self.interval = storage, trial_id, interval
        self.done = threading.Event()

    def run(self) -> None:
        while not self.done.wait(self.interval):
            try:
                self.storage.record_heartbeat(self.trial_id)
            except Exception:  # a lost connection: the next beat retries
                log.warning("heartbeat of trial %d failed; retrying", self.trial_id)


class HeartbeatLiveness:
    remote = True

    def __init__(self, storage) -> None:
        self.storage = storage
        self.interval = storage.get_heartbeat_interval()
        self._beats: dict[int, _Beat] = {}

    def hold(self, trial_id: int) -> int:
        return trial_id

    def queue_lock(self):
        """No host lock across machines: duplicates are resolved at claim time (queue.py)."""
        return nullcontext()

    def started(self, study: optuna.Study, trial_id: int) -> None:
        # A trial with no heartbeat row never counts as stale, so record one at once.
        self.storage.record_heartbeat(trial_id)
        beat = _Beat(self.storage, trial_id, self.interval)
        beat.start()
        self._beats[trial_id] = beat

    def release(self, token: int | None) -> None:
        beat = self._beats.pop(token, None) if token is not None else None
        if beat is not None:
            beat.done.set()
            beat.join()

    def recover(self, study: optuna.Study) -> None:
        """Fail trials whose heartbeat is too old; the storage's callback requeues them."""
        optuna.storages.fail_stale_trials(study)


def liveness_for(study: optuna.Study, lock_folder: Path) -> Liveness:
    """The liveness check that fits the study's storage."""
    storage = study._storage  # noqa: SLF001
    interval = getattr(storage, "get_heartbeat_interval", lambda: None)()
    if interval:
        return HeartbeatLiveness(storage)
    return LocalLiveness(lock_folder)
