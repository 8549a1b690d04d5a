"""Workers started early: they stand by while the runner prepares, and never outlive it."""

from __future__ import annotations

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
from kablate.trials.standby import Release, wait_for_release
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


def test_a_release_reaches_the_worker_and_a_closed_pipe_dismisses_it():
    import multiprocessing as mp

    reader, writer = mp.Pipe(duplex=False)
    writer.send(Release(12.5, {"v": 3.0}))
    assert wait_for_release(reader) == Release(12.5, {"v": 3.0})
    reader, writer = mp.Pipe(duplex=False)
    writer.close()  # what the runner's death does to its end
    assert wait_for_release(reader) is None


@pytest.mark.slow
def test_workers_start_after_the_latencies_and_are_killed_when_the_preparation_fails(
    tiny_sweep, tmp_path, monkeypatch
):
    started: list = []
    timed = []

    class Recorded(runner.Standby):
        def __init__(self, *args) -> None:
            super().__init__(*args)
            started.extend(proc for proc, _ in self.waiting)

    def measure(*args, **kwargs):
        timed.append(list(started))  # no worker imports torch on the cores being timed

    def fail(*args, **kwargs):
        assert started and all(p.is_alive() for p in started)  # they prepare meanwhile
        raise UsageError("the calibration could not time a variant")

    monkeypatch.setattr(runner, "Standby", Recorded)
    monkeypatch.setattr(runner, "measure_latencies", measure)
    monkeypatch.setattr(runner, "calibrate", fail)
    opts = RunOptions(results_root=tmp_path / "results", workers=2, show_progress=False)
    with pytest.raises(UsageError, match="calibration"):
        run_sweep(tiny_sweep, opts)
    assert timed == [[]]
    assert len(started) == 2
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
