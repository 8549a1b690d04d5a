"""What happens when…: a bad device, failing trials, a full disk, a torn journal.

Each scenario runs the real command line in this process (one worker, so that the faults can
be injected with monkeypatch) on the tiny sweep, and checks the exit code, the one-line
message, and that the study stays consistent: every job ends exactly once after a rerun.
"""

from __future__ import annotations

import errno
import shutil
import subprocess
import sys
from collections import Counter
from pathlib import Path

import pytest
from click.testing import CliRunner
from optuna.trial import TrialState

import kablate.train.checkpoint as checkpoint
import kablate.trials.journal as journal
import kablate.trials.worker as worker
from kablate.cli import main
from kablate.errors import EXIT_DISK_FULL, EXIT_OK, EXIT_TRIALS, EXIT_USAGE
from kablate.trials.queue import job_status, tagged_trials
from kablate.trials.store import JOURNAL, open_study

JOBS = 4  # the tiny sweep: 2 plans × 2 seeds


def kablate(*args: str):
    return CliRunner().invoke(main, list(args))


def run(sweep: Path, results: Path, *extra: str):
    return kablate("run", str(sweep), "--workers", "1", "--results", str(results), *extra)


def job_states(results: Path) -> Counter:
    study = open_study("tiny", results / "tiny", None, create=False)
    return Counter(job_status(trials)[0] for trials in tagged_trials(study).values())


def assert_each_job_completed_once(results: Path) -> None:
    study = open_study("tiny", results / "tiny", None, create=False)
    trials = study.get_trials()
    assert not [t for t in trials if t.state in (TrialState.RUNNING, TrialState.WAITING)]
    done = [t.user_attrs["job"] for t in trials if t.state == TrialState.COMPLETE]
    assert len(done) == len(set(done)) == JOBS


@pytest.mark.parametrize(
    ("device", "message"),
    [
        ("bogus", "--device must be cpu, or cuda"),
        ("meta", "'meta' cannot train a network"),
        pytest.param(
            "cuda",
            "torch sees no CUDA device",
            marks=pytest.mark.skipif(
                __import__("torch").cuda.is_available(), reason="this machine has CUDA"
            ),
        ),
    ],
)
def test_a_bad_device_exits_2_before_anything_starts(tiny_sweep, tmp_path, device, message):
    result = run(tiny_sweep, tmp_path / "results", "--device", device)
    assert result.exit_code == EXIT_USAGE
    assert message in result.output and "Traceback" not in result.output
    assert not (tmp_path / "results").exists()


def boom(*args, **kwargs):
    raise RuntimeError("boom at step 0")


@pytest.mark.slow
def test_failed_trials_exit_3_with_their_reasons_grouped_also_on_a_rerun(
    tiny_sweep, tmp_path, monkeypatch
):
    results = tmp_path / "results"
    monkeypatch.setattr(worker, "train_trial", boom)
    for _ in range(2):  # the rerun tries the failed trials again; it must not claim success
        result = run(tiny_sweep, results, "--no-report")
        assert result.exit_code == EXIT_TRIALS, result.output
        assert "error: 4 trials failed: 4 × RuntimeError: boom at step 0" in result.output
        assert "nothing new to train" not in result.output
    assert job_states(results) == {"failed": JOBS}


class DiskFills:
    """Let the first ``n_ok`` calls through, then fail every later one as on a full disk.
    With ``under``, only writes below that folder count and fail (the disk that fills); the
    calibration's scratch checkpoints in the temp folder go through."""

    def __init__(self, write, n_ok: int, under: Path | None = None) -> None:
        self.write, self.n_ok, self.n, self.under = write, n_ok, 0, under

    def __call__(self, path, *args, **kwargs):
        if self.under is not None and not Path(path).is_relative_to(self.under):
            return self.write(path, *args, **kwargs)
        self.n += 1
        if self.n > self.n_ok:
            raise OSError(errno.ENOSPC, "No space left on device", str(path))
        return self.write(path, *args, **kwargs)


@pytest.mark.slow
def test_a_full_disk_at_a_checkpoint_stops_the_run_and_puts_the_trial_back(
    tiny_sweep, tmp_path, monkeypatch
):
    results = tmp_path / "results"
    # The tiny recipe has 2 epochs: with a checkpoint after every epoch, the third checkpoint
    # is the second trial's first.
    fills = DiskFills(checkpoint.atomic_write, 2, under=results)
    monkeypatch.setattr(checkpoint, "atomic_write", fills)
    result = run(tiny_sweep, results, "--checkpoint-seconds", "0")
    assert result.exit_code == EXIT_DISK_FULL, result.output
    assert "checkpoint.pt: free space and rerun the same command" in result.output
    assert "Traceback" not in result.output and "report:" not in result.output
    assert job_states(results) == {"done": 1, "waiting": JOBS - 1}  # none failed
    monkeypatch.undo()
    again = run(tiny_sweep, results, "--no-report")
    assert again.exit_code == EXIT_OK, again.output
    assert "ran 3 trials" in again.output
    assert_each_job_completed_once(results)


@pytest.mark.slow
def test_a_full_disk_at_the_journal_stops_the_run_and_the_rerun_recovers(
    tiny_sweep, tmp_path, monkeypatch
):
    """Every append fails once the first trial's results are written: even putting the
    trial back cannot be recorded, so it stays RUNNING, and the next run requeues it."""
    results = tmp_path / "results"
    full = {"yes": False}

    def open_full(file, mode):
        fh = open(file, mode)  # noqa: SIM115 (the journal closes it)
        if "a" not in mode:
            return fh
        original = fh.write

        def write(data: bytes) -> int:
            full["yes"] = full["yes"] or b'"val_acc"' in data
            if full["yes"]:
                original(data[:10])  # a torn record, which the journal must take back
                raise OSError(errno.ENOSPC, "No space left on device")
            return original(data)

        fh.write = write
        return fh

    monkeypatch.setattr(journal, "open", open_full, raising=False)
    result = run(tiny_sweep, results, "--no-report")
    assert result.exit_code == EXIT_DISK_FULL, result.output
    assert f"disk full at {results / 'tiny' / JOURNAL}: free space and rerun" in result.output
    assert journal.scan_journal((results / "tiny" / JOURNAL).read_bytes()).clean
    assert job_states(results) == {"running": 1, "waiting": JOBS - 1}
    monkeypatch.undo()
    again = run(tiny_sweep, results, "--no-report")
    assert again.exit_code == EXIT_OK, again.output
    assert_each_job_completed_once(results)


@pytest.mark.slow
def test_a_torn_and_garbage_journal_is_repaired_and_the_sweep_finishes(tiny_sweep, tmp_path):
    results = tmp_path / "results"
    assert run(tiny_sweep, results, "--no-report").exit_code == EXIT_OK
    path = results / "tiny" / JOURNAL
    path.write_bytes(path.read_bytes()[:-40] + b"\xff\xfe garbage\n")
    damaged = path.read_bytes()

    status = kablate("status", str(results / "tiny"))
    assert status.exit_code == EXIT_OK, status.output
    assert "3/4 done, 1 running" in status.output
    report = kablate("report", str(results / "tiny"), "--no-erf")
    assert report.exit_code == EXIT_OK, report.output
    assert path.read_bytes() == damaged  # neither reader wrote to the journal

    again = run(tiny_sweep, results)
    assert again.exit_code == EXIT_OK, again.output
    assert "ran 1 trials" in again.output and "report:" in again.output
    assert_each_job_completed_once(results)
    assert list(path.parent.glob(JOURNAL + ".torn-*"))
    assert kablate("status", str(results / "tiny")).exit_code == EXIT_OK
    assert kablate("report", str(results / "tiny"), "--no-erf").exit_code == EXIT_OK


@pytest.fixture
def small_tmpfs(tmp_path):
    """A 2 MiB tmpfs (root only); skipped where mounting is not permitted."""
    where = tmp_path / "tmpfs"
    where.mkdir()
    if shutil.which("mount") is None:
        pytest.skip("no mount command")
    done = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", "size=2m", "tmpfs", str(where)], capture_output=True
    )
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {done.stderr.decode().strip()}")
    yield where
    subprocess.run(["umount", "-l", str(where)], check=False)


@pytest.mark.slow
@pytest.mark.parametrize("workers", ["1", "2"])
def test_a_real_full_disk_stops_the_run_and_freeing_space_finishes_it(
    tiny_sweep, small_tmpfs, workers
):
    filler = small_tmpfs / "filler"
    free = shutil.disk_usage(small_tmpfs).free
    filler.write_bytes(b"\0" * (free - 150 * 1024))  # room for about one trial
    results = small_tmpfs / "results"
    cmd = [sys.executable, "-m", "kablate", "run", str(tiny_sweep), "--workers", workers]
    cmd += ["--results", str(results), "--no-report"]
    full = subprocess.run(cmd, capture_output=True, text=True, timeout=240)
    assert full.returncode == EXIT_DISK_FULL, full.stderr
    assert "free space and rerun the same command" in full.stderr
    assert "Traceback" not in full.stderr
    if (results / "tiny" / JOURNAL).is_file():
        assert "failed" not in job_states(results)
    filler.unlink()
    again = subprocess.run(cmd, capture_output=True, text=True, timeout=240)
    assert again.returncode == EXIT_OK, again.stderr
    assert_each_job_completed_once(results)
