"""What kablate says while it works: one timestamped line per step, and never a long silence.

A new user who starts a sweep under nohup reads its output as a log; a gap of a minute looks
like a hang. So every phase of a long command (start-up, calibration, the sweep, the report)
logs one line as each of its steps begins (`step`), and while a `Steps` is open and nothing
else reaches the console for `pulse_seconds()` (6 s; ``$KABLATE_PROGRESS_SECONDS`` changes it,
for tests), a thread logs a line that says the step is still going, or whatever that `Steps`'s
own ``pulse`` says (the sweep's: trials finished, running, and the ETA).

This module imports only the standard library: the CLI installs its console before it imports
torch, pandas and matplotlib, which alone can take ten seconds on a busy machine.
"""

from __future__ import annotations

import logging
import os
import sys
import threading
import time
from collections.abc import Callable

log = logging.getLogger("kablate")

LOG_FORMAT = "%(asctime)s %(levelname)s %(message)s"
LOG_DATE_FORMAT = "%Y-%m-%d %H:%M:%S"
FILE_ONLY = "file_only"  # a log record with this extra set to True skips the console
STEP = "step"  # a record with this extra set to True reaches the console on a terminal too
# Under the 10 s a user may wait for a line (the target of issue 15), with room for a busy
# machine: at load 11 on two cores a pulse came 2.3 s late while torch was being imported.
PULSE_SECONDS = 6.0
PULSE_ENV = "KABLATE_PROGRESS_SECONDS"


def pulse_seconds() -> float:
    """Seconds of console silence after which a running step says it is still going."""
    try:
        value = float(os.environ.get(PULSE_ENV, ""))
    except ValueError:
        return PULSE_SECONDS
    return value if value > 0 else PULSE_SECONDS


class Silence:
    """When the console last showed a line (a filter on the console handler sees each one)."""

    def __init__(self) -> None:
        self.last = time.monotonic()

    def filter(self, record: logging.LogRecord) -> bool:
        self.last = time.monotonic()
        return True

    def seconds(self) -> float:
        return time.monotonic() - self.last


SILENCE = Silence()


class ConsoleHandler(logging.StreamHandler):
    """Writes to the ``sys.stderr`` of the moment, so that a handler left on the logger never
    writes to a stream that was swapped and closed since (click's test runner does that)."""

    @property
    def stream(self):
        return sys.stderr

    @stream.setter
    def stream(self, value) -> None:  # StreamHandler.__init__ sets it; the property wins
        pass


def console_handler(steps_only: bool) -> logging.Handler:
    """The console's handler: every record but FILE_ONLY ones, or (on a terminal, where a
    progress bar owns the screen while trials run) only the steps."""
    handler = ConsoleHandler()
    handler.setFormatter(logging.Formatter(LOG_FORMAT, LOG_DATE_FORMAT))
    handler.addFilter(lambda record: not getattr(record, FILE_ONLY, False))
    if steps_only:
        handler.addFilter(lambda record: getattr(record, STEP, False))
    handler.addFilter(SILENCE)  # last: it counts only the lines that are shown
    return handler


def show_steps() -> None:
    """Send the steps of a command to the console before any log file exists (the runner's
    `setup_logging` replaces this handler with its own pair once it knows the results folder)."""
    log.setLevel(logging.INFO)
    log.propagate = False
    if not any(isinstance(h, ConsoleHandler) for h in log.handlers):
        log.addHandler(console_handler(steps_only=True))


class Current:
    """The step that runs now (set by `step`), for the line that says it is still going."""

    def __init__(self) -> None:
        self.text, self.since = "", time.monotonic()

    def still(self) -> str:
        seconds = time.monotonic() - self.since
        return f"{self.text or 'working'}: still going ({seconds:.0f}s so far)"


CURRENT = Current()
ACTIVE: list[Steps] = []  # the open `Steps`, innermost last: only the innermost speaks


def step(phase: str, text: str) -> None:
    """Log "PHASE: TEXT" as the step that runs now; shown on the console on a terminal too."""
    CURRENT.text, CURRENT.since = f"{phase}: {text}", time.monotonic()
    log.info("%s: %s", phase, text, extra={STEP: True})


class Steps:
    """While open, a thread speaks up whenever the console has been silent for
    `pulse_seconds()`: by default "PHASE: TEXT: still going (12s so far)" of the last `step`.

    They nest (the CLI opens one for a whole command, the runner one for its trials); only the
    innermost speaks.

    Args:
        pulse: returns the line to log after a silence, instead of the default.
        on_terminal: whether the pulse lines are steps (shown on a terminal too); the sweep's
            are not, since its progress bar shows the same there.
    """

    def __init__(self, pulse: Callable[[], str] | None = None, on_terminal: bool = True) -> None:
        self.pulse, self.on_terminal = pulse, on_terminal
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self.watch, name="kablate-steps", daemon=True)

    def watch(self) -> None:
        period = pulse_seconds()
        while not self.stop.wait(max(0.05, period - SILENCE.seconds())):
            if SILENCE.seconds() < period or not ACTIVE or ACTIVE[-1] is not self:
                continue
            try:
                text = self.pulse() if self.pulse is not None else CURRENT.still()
            except Exception as exc:  # a pulse must never take the run down
                text = f"{CURRENT.text or 'working'}: ({type(exc).__name__}: {exc})"
            log.info("%s", text, extra={STEP: self.on_terminal})
            SILENCE.last = time.monotonic()  # also when the line went to the log file only

    def start(self) -> Steps:
        ACTIVE.append(self)
        self.thread.start()
        return self

    def close(self) -> None:
        self.stop.set()
        self.thread.join()
        ACTIVE.remove(self)

    def __enter__(self) -> Steps:
        return self.start()

    def __exit__(self, *exc) -> None:
        self.close()
