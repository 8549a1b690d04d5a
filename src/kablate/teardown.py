"""Leaving a process once its work is written, without the interpreter's teardown.

A Python process that has imported torch (and torchvision, pandas, matplotlib) spends one to
two seconds at exit tearing its modules down, and more on a busy machine: it frees objects one
by one and writes nothing. A sweep pays it in every worker and again in the command itself, at
the end of the run, where a user waits for the prompt. `exit_without_teardown` does what a
normal exit does that matters (the ``atexit`` handlers, among them logging's flush and close
and multiprocessing's clean-up; flushing stdout and stderr), then ends the process at once.

The contract: call it only when everything the process has to say is written (its files
closed, its storage told). While another non-daemon thread runs, it exits the normal way, so
that the interpreter stops that thread as it would have.
"""

from __future__ import annotations

import atexit
import os
import sys
import threading
from typing import NoReturn


def exit_code(code: object) -> int:
    """The exit status that ``sys.exit(code)`` gives: None is 0, an int is itself, anything
    else is printed to stderr and gives 1."""
    if code is None:
        return 0
    if isinstance(code, int):
        return code
    sys.stderr.write(f"{code}\n")
    return 1


def exit_without_teardown(code: object = 0) -> NoReturn:
    """End the process with ``code`` (as `exit_code` reads it), skipping the module teardown."""
    status = exit_code(code)
    others = [t for t in threading.enumerate() if t is not threading.main_thread()]
    if any(t.is_alive() and not t.daemon for t in others):
        sys.exit(status)  # the interpreter stops them its own way first
    atexit._run_exitfuncs()  # noqa: SLF001 (what a normal exit runs; the only way to run them)
    try:
        sys.stdout.flush()
        sys.stderr.flush()
    except (OSError, ValueError):  # a closed pipe: let Python report it as it would
        sys.exit(status)
    os._exit(status)
