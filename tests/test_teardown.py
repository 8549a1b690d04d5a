"""A process that leaves without the interpreter's teardown still runs what a normal exit must."""

from __future__ import annotations

import subprocess
import sys
import textwrap

from tests.conftest import REPO

LEAVES = """
import atexit, sys, threading
from pathlib import Path
from kablate.teardown import exit_without_teardown

out = Path(sys.argv[1])

class Torn:  # its __del__ runs only when the modules are torn down
    def __del__(self):
        with out.open("a") as f:
            f.write("teardown\\n")

torn = Torn()
atexit.register(lambda: out.open("a").write("atexit\\n"))
print("printed, not yet flushed", end="")
if sys.argv[2] == "thread":  # a non-daemon thread still running: exit the normal way
    threading.Thread(target=lambda: None).start()
    threading.Thread(target=threading.Event().wait, args=(0.2,)).start()
exit_without_teardown(int(sys.argv[3]))
"""


def leave(tmp_path, mode: str, code: int) -> tuple[subprocess.CompletedProcess, list[str]]:
    script, out = tmp_path / "leaves.py", tmp_path / "out.txt"
    script.write_text(textwrap.dedent(LEAVES))
    done = subprocess.run(
        [sys.executable, str(script), str(out), mode, str(code)],
        capture_output=True,
        text=True,
        env={"PYTHONPATH": str(REPO / "src")},
    )
    return done, out.read_text().split() if out.is_file() else []


def test_it_runs_the_atexit_handlers_flushes_and_skips_the_teardown(tmp_path):
    done, seen = leave(tmp_path, "alone", 3)
    assert done.returncode == 3
    assert done.stdout == "printed, not yet flushed"
    assert seen == ["atexit"]  # and not "teardown": the module teardown was skipped


def test_with_a_non_daemon_thread_running_it_exits_the_normal_way(tmp_path):
    done, seen = leave(tmp_path, "thread", 0)
    assert done.returncode == 0
    assert seen == ["atexit", "teardown"]
