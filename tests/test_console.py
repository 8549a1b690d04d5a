"""Never silent: the step lines and the lines after a silence (console.py), in-process and
through the real command line under nohup-like pipes.

No test times anything: the pulse period is shortened through ``$KABLATE_PROGRESS_SECONDS`` and
the tests check that the lines appear (waiting for them, with a generous limit), never how
far apart they are.
"""

from __future__ import annotations

import logging
import os
import re
import subprocess
import sys
import time
from pathlib import Path

import pytest

from kablate.console import PULSE_ENV, PULSE_SECONDS, Steps, pulse_seconds, step
from tests.conftest import TINY_SWEEP, write_sweep

STAMP = re.compile(r"^\d{4}-\d\d-\d\d \d\d:\d\d:\d\d INFO ")


class Lines(logging.Handler):
    def __init__(self) -> None:
        super().__init__()
        self.lines: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.lines.append(record.getMessage())


@pytest.fixture
def lines(monkeypatch):
    monkeypatch.setenv(PULSE_ENV, "0.05")
    logger = logging.getLogger("kablate")
    handler, level = Lines(), logger.level
    logger.addHandler(handler)
    logger.setLevel(logging.INFO)
    yield handler.lines
    logger.removeHandler(handler)
    logger.setLevel(level)


def wait_for(found, limit: float = 60.0) -> None:
    """Wait until ``found()``; the limit only ends a test whose line never comes."""
    deadline = time.monotonic() + limit
    while not found() and time.monotonic() < deadline:
        time.sleep(0.01)


def test_the_period_comes_from_the_environment(monkeypatch):
    monkeypatch.setenv(PULSE_ENV, "0.5")
    assert pulse_seconds() == 0.5
    for bad in ("", "0", "-1", "soon"):
        monkeypatch.setenv(PULSE_ENV, bad)
        assert pulse_seconds() == PULSE_SECONDS


def test_a_silent_step_says_it_is_still_going(lines):
    with Steps():
        step("report", "drawing the plots")
        wait_for(lambda: len(lines) >= 3)
    assert lines[0] == "report: drawing the plots"
    assert lines[1].startswith("report: drawing the plots: still going ("), lines
    n = len(lines)
    time.sleep(0.2)  # closed: no more lines (a leftover thread would add some)
    assert len(lines) == n


def test_only_the_innermost_steps_speak(lines):
    with Steps(lambda: "outer"), Steps(lambda: "inner"):
        start = len(lines)
        wait_for(lambda: lines[start:].count("inner") >= 3)
        said = lines[start:]
    assert said.count("inner") >= 3 and "outer" not in said, said


def test_a_failing_pulse_is_reported_not_raised(lines):
    def broken() -> str:
        raise RuntimeError("storage busy")

    with Steps(broken):
        step("sweep", "training")
        wait_for(lambda: len(lines) >= 2)
    assert "RuntimeError: storage busy" in lines[1]


@pytest.mark.slow
@pytest.mark.timeout(900)  # a busy shared machine slows start-up many times over
def test_a_sweep_under_nohup_is_never_silent(tmp_path: Path):
    """The real command, stdout and stderr piped (no terminal), as under nohup: each phase
    says what it does, each line carries its time, and lines come after every silence."""
    # Trials long enough (about 2 s each) that the sweep has silences for the pulse to fill:
    # the workers are ready when the sweep starts, and the tiny sweep's 4 trials would
    # otherwise end within a second.
    longer = TINY_SWEEP.replace("train_size = 200", "train_size = 1000").replace(
        'from = "configs/tiny-recipe.toml"', 'from = "configs/tiny-recipe.toml"\nepochs = 30'
    )
    sweep = write_sweep(tmp_path, longer)
    env = dict(os.environ, **{PULSE_ENV: "0.2"})
    cmd = [sys.executable, "-m", "kablate", "run", str(sweep), "--workers", "2"]
    out = subprocess.run(
        [*cmd, "--results", str(tmp_path / "results")],
        cwd=tmp_path,
        env=env,
        stdin=subprocess.DEVNULL,
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert out.returncode == 0, out.stderr
    logged = [line for line in out.stderr.splitlines() if " INFO " in line]
    assert logged and all(STAMP.match(line) for line in logged), out.stderr
    said = [STAMP.sub("", line) for line in logged]

    def first(prefix: str) -> int:
        return next(i for i, line in enumerate(said) if line.startswith(prefix))

    phases = [
        "start-up: loading torch",
        "start-up: preparing the data",
        "calibration: variant 1/2",
        "sweep: training 4 trials",
        "report: analysing",
        "report: drawing the plots",
        "report: writing the model card",
    ]
    order = [first(p) for p in phases]
    assert order == sorted(order), said
    # The lines after a silence: in a step, and while trials run (the finished trials give
    # at most one progress line each; the rest are the pulse's).
    assert any(": still going (" in line for line in said), said
    progress = [line for line in said if line.startswith("progress: ")]
    assert len(progress) > 4, said
    # Without --budget the estimate is printed once, after calibration.
    assert out.stdout.count("estimate: 4 trials to run take about") == 1, out.stdout
    log = (tmp_path / "results" / "tiny" / "run.log").read_text()
    assert "calibration: variant 2/2: stem-5" in log and "progress: " in log
