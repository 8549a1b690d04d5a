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
import subprocess
import sys
import time
from pathlib import Path

import pytest
import torch
from optuna.trial import TrialState

from kablate.results.paths import CHECKPOINT
from kablate.trials.store import open_study
from tests.conftest import TINY_SWEEP, write_sweep

JOBS = 4  # 2 plans × 2 seeds
EPOCHS = 40
EARLY = EPOCHS // 2  # a checkpoint before this epoch leaves its trial half of its epochs to run


@pytest.fixture
def long_sweep(tmp_path: Path) -> Path:
    """The tiny sweep, made long enough (about 2 s a trial here) to be caught mid-trial.

    With 200 images an epoch takes about 10 ms, so a whole trial could start, checkpoint and
    finish between two looks of the test; 1,200 images and 40 epochs leave a wide window.
    """
    body = TINY_SWEEP.replace(
        'from = "configs/tiny-recipe.toml"', f'from = "configs/tiny-recipe.toml"\nepochs = {EPOCHS}'
    ).replace("train_size = 200", "train_size = 1200")
    return write_sweep(tmp_path, body)


def kablate(*args: str, storage: str | None, cwd: Path, wait: bool = True):
    cmd = [sys.executable, "-m", "kablate", *args]
    if storage:
        cmd += ["--storage", storage]
    env = dict(os.environ, KABLATE_HEARTBEAT_SECONDS="1")
    if wait:
        return subprocess.run(cmd, cwd=cwd, env=env, capture_output=True, text=True, timeout=240)
    return subprocess.Popen(
        cmd,
        cwd=cwd,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,  # its own process group, like a job in a terminal
    )


def run_args(sweep: Path, results: Path, *extra: str) -> list[str]:
    return ["run", str(sweep), "--workers", "2", "--results", str(results), "--no-report", *extra]


def study_of(results: Path, storage: str | None):
    return open_study("tiny", results / "tiny", storage, create=False)


def early_checkpoint(path: Path) -> bool:
    """A checkpoint from one of the first epochs: its trial will not finish for a while."""
    if not path.is_file():
        return False
    return torch.load(path, map_location="cpu", weights_only=True)["epoch"] < EARLY


def wait_for_study(results: Path, storage: str | None, proc, deadline: float):
    """The run's study, opened once it exists (the runner creates it)."""
    while time.time() < deadline:
        assert proc.poll() is None, proc.communicate()
        if storage or (results / "tiny" / "study.journal").is_file():
            try:
                return study_of(results, storage)
            except Exception:  # the study is still being created
                pass
        time.sleep(0.05)
    raise AssertionError("the run did not create its study in time")


def wait_for_running_trial(results: Path, storage: str | None, proc, ready, what: str):
    """(job key, worker pid) of a running trial for which ``ready(trial)`` holds.

    The study is opened once and then only read, so that one look takes milliseconds on
    either storage, far less than the second or so a trial spends before ``EARLY``.
    """
    deadline = time.time() + 120
    study = wait_for_study(results, storage, proc, deadline)
    while time.time() < deadline:
        assert proc.poll() is None, proc.communicate()
        for t in study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)):
            worker = t.user_attrs.get("worker")
            if worker and ready(t):
                return t.user_attrs.get("job"), int(worker.rsplit(":", 1)[1])
        time.sleep(0.02)
    raise AssertionError(f"no trial {what} in time")


def wait_for_checkpointed_trial(results: Path, storage: str | None, proc) -> tuple[str, int]:
    """(job key, worker pid) of a running trial that has written an early epoch checkpoint."""

    def ready(t) -> bool:
        return early_checkpoint(results / "tiny" / "trials" / t.user_attrs["job"] / CHECKPOINT)

    return wait_for_running_trial(results, storage, proc, ready, "reached its first checkpoint")


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
    assert report["layout"] == {"workers": 2, "threads": 1}

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
