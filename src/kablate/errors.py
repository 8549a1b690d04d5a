"""The exceptions kablate raises on purpose, and the exit codes of the command line.

`KablateError` is the base. `UsageError` (and its subclasses) means the user gave us something
we cannot use: the CLI prints its message and exits with code 2, without a traceback.
`DiskFullError` stops a run without failing its trials (exit code 4). Each class carries its
exit code; the README's exit-code table lists the same codes.
"""

from __future__ import annotations

import errno
from difflib import get_close_matches
from pathlib import Path

EXIT_OK = 0  # every trial finished, or the budget ended the run as planned
EXIT_ERROR = 1  # a KablateError that is not the user's input
EXIT_USAGE = 2  # bad input: sweep file, command line, data, storage URL
EXIT_TRIALS = 3  # trials failed, or none could run
EXIT_DISK_FULL = 4  # no space left: the run stopped, its trials are back in the queue
EXIT_STOPPED = 130  # Ctrl-C or SIGTERM: the run stopped, its trials are back in the queue

DISK_FULL_ERRNOS = (errno.ENOSPC, errno.EDQUOT)


class KablateError(Exception):
    """Base class for every error kablate raises on purpose."""

    exit_code = EXIT_ERROR


class UsageError(KablateError):
    """Bad input from the user: a sweep file, a command-line value, a missing dataset."""

    exit_code = EXIT_USAGE


class DiskFullError(KablateError):
    """No space (or quota) left while writing ``path``; nothing is lost, the run must stop."""

    exit_code = EXIT_DISK_FULL

    def __init__(self, path: Path | str, detail: str = "") -> None:
        self.path = str(path)
        more = f" ({detail})" if detail else ""
        super().__init__(f"disk full at {self.path}{more}: free space and rerun the same command")


def is_disk_full(exc: BaseException) -> bool:
    """Whether ``exc`` is an OSError for a full disk or an exhausted quota."""
    return isinstance(exc, OSError) and exc.errno in DISK_FULL_ERRNOS


class SweepError(UsageError):
    """Something is wrong in a sweep file or a config it includes.

    Args:
        source: the file the problem is in (shown as given, usually relative).
        key: the dotted key path, e.g. ``recipe.epochs`` or ``network.stages[1].out_ch``.
        message: what is wrong and what is allowed.
        line: the line number, when known (syntax errors).
    """

    def __init__(self, source: str, key: str, message: str, line: int | None = None):
        self.source, self.key, self.line = source, key, line
        where = f"{source}, line {line}" if line else source
        text = f"{where}: `{key}` {message}" if key else f"{where}: {message}"
        super().__init__(text)


class PlanError(UsageError):
    """A variant that cannot be built: bad kernel spec, map smaller than 1×1, kernel too large."""


class DataError(UsageError):
    """A dataset that cannot be found or read."""


def did_you_mean(word: str, choices: list[str] | tuple[str, ...]) -> str:
    """Return ``"; did you mean `x`?"`` for the closest choice, or an empty string."""
    close = get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f"; did you mean `{close[0]}`?" if close else ""
