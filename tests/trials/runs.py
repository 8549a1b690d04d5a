"""Helpers the run tests share (not tests themselves): the racing sweep, and the command line
run with 2 workers on a long tiny sweep that a test can catch mid-trial (conftest.long_sweep).

The racing sweep's "blind" plan is our own construction: every 3×3 kernel dilated by the side of
its input (8 on the 8×8 digits, 4 on stage2's 4×4 map), so each off-centre tap of every conv
lands in the zero padding and the network sees one pixel at a time before the global pool. It
costs the MACs of all-3 and stays near chance.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import subprocess
import sys
import time
from pathlib import Path

import torch
from optuna.trial import TrialState

from kablate.results.paths import CHECKPOINT
from kablate.trials.store import open_study

RACE_SWEEP = """
[sweep]
name = "{name}"
seeds = {seeds}
racing = "{racing}"

[data]
source = "digits"
train_size = 400
val_size = 200
test_size = 100

[network]
from = "configs/tiny-net.toml"

[recipe]
from = "configs/tiny-recipe.toml"
epochs = 4  # all-3 reaches about 60% on digits, far from the blind plan's chance level

[[plan]]
name = "all-3"
body = "3"

[[plan]]
name = "stem-5"
stem = "5"

[[plan]]
name = "blind"
stem = "3d8"
stage1 = "3d8"
stage2 = "3d4"
"""


JOBS = 4  # 2 plans × 2 seeds
EPOCHS = 40
EARLY = EPOCHS // 2  # a checkpoint before this epoch leaves its trial half of its epochs to run


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
    # Every epoch: a test waits for an early checkpoint and kills the run after it.
    return [
        "run",
        str(sweep),
        "--workers",
        "2",
        "--results",
        str(results),
        "--no-report",
        "--checkpoint-seconds",
        "0",
        *extra,
    ]


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


def run_at_once(target, arg_tuples: list[tuple]) -> None:
    """Run ``target(*args, go)`` in one spawned process per tuple of ``arg_tuples``; each calls
    ``go.wait()`` once it is ready (imports done, study open), and ``go``, a barrier of all of
    them, lets them go together only when every one is. Fail unless each exits 0."""
    ctx = mp.get_context("spawn")
    go = ctx.Barrier(len(arg_tuples))
    procs = [ctx.Process(target=target, args=(*args, go)) for args in arg_tuples]
    for proc in procs:
        proc.start()
    for proc in procs:
        proc.join(timeout=240)
        assert proc.exitcode == 0
