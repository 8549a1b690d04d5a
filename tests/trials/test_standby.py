"""Workers started early: they stand by while the runner prepares, and never outlive it."""

from __future__ import annotations

import multiprocessing as mp
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

import kablate.trials.runner as runner
from kablate.errors import UsageError
from kablate.trials.runner import RunOptions, run_sweep
from kablate.trials.standby import READY, Release, Standby, spawn, wait_for_release
from tests.conftest import REPO


def gone(pid: int) -> bool:
    """The process has ended (a zombie left for its reaper counts as ended)."""
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except FileNotFoundError:
        return True
    return state in ("Z", "X")


def wait_until_gone(pids: list[int], seconds: float = 60) -> list[int]:
    """The pids still alive after waiting up to ``seconds`` for them to end."""
    deadline = time.time() + seconds
    while time.time() < deadline and not all(gone(p) for p in pids):
        time.sleep(0.1)
    return [p for p in pids if not gone(p)]


def test_a_worker_reports_ready_then_a_release_reaches_it_and_a_closed_pipe_dismisses_it():
    import multiprocessing as mp

    runner_end, worker_end = mp.Pipe()
    runner_end.send(Release(12.5, {"v": 3.0}))
    assert wait_for_release(worker_end) == Release(12.5, {"v": 3.0})
    assert runner_end.recv() == READY
    runner_end, worker_end = mp.Pipe()
    runner_end.close()  # what the runner's death does to its end
    assert wait_for_release(worker_end) is None


def prepares(conn, seconds: float, dies: bool) -> None:
    """A stand-in worker: prepares for ``seconds``, then dies or reports ready and waits."""
    time.sleep(seconds)
    if dies:
        os._exit(3)
    wait_for_release(conn)


@pytest.mark.parametrize("dies", [False, True])
def test_waiting_until_idle_returns_once_every_worker_is_ready_or_dead(dies):
    standby = Standby.__new__(Standby)  # the pipes and processes of __init__, without a sweep
    standby.waiting, standby.ready = [], set()
    for seconds in (0.2, 1.0):
        ours, theirs = mp.get_context("spawn").Pipe()
        proc = spawn(prepares, theirs, seconds, dies and seconds > 0.5)
        theirs.close()
        standby.waiting.append((proc, ours))
    try:
        late = standby.wait_until_idle(timeout=0.01)  # both still start up
        assert late == [proc for proc, _ in standby.waiting]
        assert standby.wait_until_idle(timeout=120) == []
        slow = standby.waiting[1][0]
        assert (slow.pid in standby.ready) is not dies
        assert standby.waiting[0][0].pid in standby.ready
        if dies:
            slow.join(10)
            assert slow.exitcode == 3
    finally:
        standby.close()


@pytest.mark.slow
def test_workers_prepare_during_the_preflight_are_idle_while_timed_and_killed_on_failure(
    tiny_sweep, tmp_path, monkeypatch
):
    started: list = []
    standbys: list = []
    timed = []

    class Recorded(runner.Standby):
        def __init__(self, *args) -> None:
            super().__init__(*args)
            started.extend(proc for proc, _ in self.waiting)
            standbys.append(self)

    preflight = runner.run_preflight

    def checked_preflight(*args, **kwargs):
        assert len(started) == 2  # they prepare while the preflight runs
        preflight(*args, **kwargs)

    def ready_now() -> list[bool]:  # per worker: alive, and done preparing (only waits)
        return [p.is_alive() and p.pid in standbys[0].ready for p in started]

    def measure(*args, **kwargs):
        timed.append(ready_now())  # no worker imports torch on the cores being timed

    def fail(*args, **kwargs):
        timed.append(ready_now())
        raise UsageError("the calibration could not time a variant")

    monkeypatch.setattr(runner, "Standby", Recorded)
    monkeypatch.setattr(runner, "run_preflight", checked_preflight)
    monkeypatch.setattr(runner, "measure_latencies", measure)
    monkeypatch.setattr(runner, "calibrate", fail)
    opts = RunOptions(results_root=tmp_path / "results", workers=2, show_progress=False)
    with pytest.raises(UsageError, match="calibration"):
        run_sweep(tiny_sweep, opts)
    assert timed == [[True, True], [True, True]]
    assert [p.exitcode for p in started] == [-signal.SIGKILL] * 2


STANDS_BY = """
import sys, time
from kablate.trials.pool import worker_main
from kablate.trials.standby import Standby, WorkerSetup

if __name__ == "__main__":
    setup = WorkerSetup(sys.argv[1], sys.argv[2], None, 1, "cpu", 0.0)
    standby = Standby(worker_main, setup, 2)
    print(*(proc.pid for proc, _ in standby.waiting), flush=True)
    time.sleep(600)
"""


@pytest.mark.slow
def test_a_worker_standing_by_exits_when_its_runner_dies(tiny_sweep, tmp_path):
    script = tmp_path / "runner.py"
    script.write_text(STANDS_BY)
    results = tmp_path / "results"
    env = dict(os.environ, PYTHONPATH=str(REPO / "src"))
    parent = subprocess.Popen(
        [sys.executable, str(script), str(tiny_sweep), str(results)],
        stdout=subprocess.PIPE,
        text=True,
        env=env,
    )
    pids = [int(p) for p in parent.stdout.readline().split()]
    assert len(pids) == 2 and not any(gone(p) for p in pids)
    # The workers log to run.log as they prepare: wait for both to be well under way.
    log = results / "tiny" / "run.log"
    deadline = time.time() + 120
    while time.time() < deadline and not log.is_file():
        time.sleep(0.1)
    time.sleep(1.0)
    assert not any(gone(p) for p in pids)  # standing by, not exited on their own
    parent.kill()  # SIGKILL: no clean-up of its own runs
    parent.wait()
    assert wait_until_gone(pids) == []
