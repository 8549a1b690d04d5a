"""Surviving the night: a SIGKILLed worker, Ctrl-C, and two runners sharing one study.

Each test runs the real command line (``python -m kablate run``) with 2 worker processes on a
tiny sweep (4 trials of a tiny net on 200 digits), on the default journal file and on a
throwaway PostgreSQL server (conftest.py). What must hold, from the issue: every
(variant, seed) is done exactly once, and no completed result changes on a rerun.
"""

from __future__ import annotations

import json
import os
import re
import signal
import time
from pathlib import Path

import pytest
from optuna.trial import TrialState

from tests.trials.runs import (
    JOBS,
    kablate,
    run_args,
    study_of,
    wait_for_checkpointed_trial,
)


def completed(results: Path, storage: str | None) -> dict[str, tuple]:
    """Job key → (trial number, values, test accuracy) of every COMPLETE trial."""
    out: dict[str, tuple] = {}
    for t in study_of(results, storage).get_trials(states=(TrialState.COMPLETE,)):
        key = t.user_attrs["job"]
        assert key not in out, f"{key} was completed twice"
        out[key] = (t.number, tuple(t.values), t.user_attrs["test_acc"])
    return out


def assert_each_job_done_once(results: Path, storage: str | None) -> list:
    trials = study_of(results, storage).get_trials()
    assert not [t for t in trials if t.state in (TrialState.RUNNING, TrialState.WAITING)]
    done = [t.user_attrs["job"] for t in trials if t.state == TrialState.COMPLETE]
    assert len(done) == len(set(done)) == JOBS
    return trials


@pytest.mark.slow
def test_a_sigkilled_worker_is_detected_and_its_trial_resumes(long_sweep, tmp_path, storage):
    results = tmp_path / "results"
    proc = kablate(*run_args(long_sweep, results), storage=storage, cwd=tmp_path, wait=False)
    key, pid = wait_for_checkpointed_trial(results, storage, proc)
    before = completed(results, storage)
    os.kill(pid, signal.SIGKILL)

    # `status` from another terminal while the run goes on.
    status = kablate(
        "status", str(results / "tiny"), "--format", "json", storage=storage, cwd=tmp_path
    )
    assert status.returncode == 0, status.stderr
    report = json.loads(status.stdout)
    assert report["n_trials"] == JOBS and sum(report["counts"].values()) == JOBS
    assert {v["variant"] for v in report["variants"]} == {"all-3", "stem-5"}
    assert report["staffing"] == {"workers": 2, "threads": 1}

    out, err = proc.communicate(timeout=240)
    assert proc.returncode == 0, err
    trials = assert_each_job_done_once(results, storage)
    lost = [t for t in trials if t.user_attrs.get("job") == key and t.state == TrialState.FAIL]
    assert lost, "the killed trial should have been failed and requeued"
    rerun = [t for t in trials if t.user_attrs.get("job") == key and t.state == TrialState.COMPLETE]
    assert rerun[0].user_attrs["note"].startswith("resumed at epoch")  # from its checkpoint
    first = completed(results, storage)
    assert all(first[k] == v for k, v in before.items())

    again = kablate(*run_args(long_sweep, results), storage=storage, cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    assert "nothing new to train" in again.stdout
    assert completed(results, storage) == first


@pytest.mark.slow
def test_ctrl_c_requeues_the_running_trials_and_the_same_command_resumes(
    long_sweep, tmp_path, storage
):
    results = tmp_path / "results"
    proc = kablate(*run_args(long_sweep, results), storage=storage, cwd=tmp_path, wait=False)
    wait_for_checkpointed_trial(results, storage, proc)
    before = completed(results, storage)
    sent = time.time()
    os.killpg(proc.pid, signal.SIGINT)  # what Ctrl-C in a terminal does
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert time.time() - sent < 30  # it stopped at the next batch, not at the end of the sweep
    assert "Resume with the same command" in err
    trials = study_of(results, storage).get_trials()
    assert not [t for t in trials if t.state == TrialState.RUNNING]
    interrupted = [t for t in trials if t.user_attrs.get("outcome") == "interrupted"]
    assert interrupted
    waiting = {t.user_attrs["job"] for t in trials if t.state == TrialState.WAITING}
    assert {t.user_attrs["job"] for t in interrupted} <= waiting  # back in the queue

    again = kablate(*run_args(long_sweep, results), storage=storage, cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    trials = assert_each_job_done_once(results, storage)
    stopped = {t.user_attrs["job"] for t in interrupted}
    resumed = [t for t in trials if t.user_attrs.get("job") in stopped and t.state.is_finished()]
    # At least the trial caught past its first checkpoint resumes from it.
    assert any(t.user_attrs.get("note", "").startswith("resumed at epoch") for t in resumed)
    after = completed(results, storage)
    assert all(after[k] == v for k, v in before.items())


@pytest.mark.slow
@pytest.mark.postgres
def test_two_machines_share_one_postgres_sweep(tiny_sweep, tmp_path, postgres_url):
    # Two runners with their own results folders stand in for two machines.
    a, b = tmp_path / "machine-a", tmp_path / "machine-b"
    procs = [
        kablate(
            "run",
            str(tiny_sweep),
            "--workers",
            "1",
            "--results",
            str(root),
            "--no-report",
            storage=postgres_url,
            cwd=tmp_path,
            wait=False,
        )
        for root in (a, b)
    ]
    n_ran = []
    for proc in procs:
        out, err = proc.communicate(timeout=240)
        assert proc.returncode == 0, err
        assert os.environ["PGPASSWORD"] not in out + err
        # A runner that starts after the other has taken every job trains none.
        ran = re.search(r"ran (\d+) trials", out)
        assert ran or "nothing new to train" in out, out
        n_ran.append(int(ran.group(1)) if ran else 0)
    assert sum(n_ran) == JOBS  # each runner counts only the trials its own worker ran
    trials = assert_each_job_done_once(a, postgres_url)
    # Both runners enqueued the jobs at once; the extra copies were refused at claim time.
    extra = [t for t in trials if t.state == TrialState.FAIL]
    assert all(t.user_attrs.get("outcome") == "duplicate" for t in extra)
    statuses = [
        kablate("status", str(root / "tiny"), "--format", "json", storage=None, cwd=tmp_path)
        for root in (a, b)
    ]
    assert [s.returncode for s in statuses] == [0, 0], statuses[0].stderr
    counts = [json.loads(s.stdout)["counts"] for s in statuses]
    assert counts[0] == counts[1] and counts[0]["done"] == JOBS
    for root in (a, b):  # the recorded storage has no password
        assert os.environ["PGPASSWORD"] not in (root / "tiny" / "sweep.json").read_text()


def worker_pids(parent: int) -> list[int]:
    """The runner's child processes (its spawned workers), from /proc."""
    children = Path(f"/proc/{parent}/task/{parent}/children")
    return [int(p) for p in children.read_text().split()] if children.exists() else []


@pytest.mark.slow
def test_ctrl_c_while_the_workers_start_gives_no_traceback(long_sweep, tmp_path):
    # A worker process spends its first seconds importing torch; a Ctrl-C then used to print
    # one KeyboardInterrupt traceback per worker. Now they start with SIGINT ignored and the
    # runner passes the stop on once they listen.
    results = tmp_path / "results"
    proc = kablate(*run_args(long_sweep, results), storage=None, cwd=tmp_path, wait=False)
    deadline = time.time() + 120
    while len(worker_pids(proc.pid)) < 2 and time.time() < deadline and proc.poll() is None:
        time.sleep(0.05)
    assert len(worker_pids(proc.pid)) >= 2, "the workers did not start"
    time.sleep(0.3)  # inside their imports
    os.killpg(proc.pid, signal.SIGINT)  # what Ctrl-C in a terminal does
    out, err = proc.communicate(timeout=180)
    assert proc.returncode == 130, err
    assert "Traceback" not in err and "KeyboardInterrupt" not in err, err
    assert not [t for t in study_of(results, None).get_trials() if t.state == TrialState.RUNNING]
