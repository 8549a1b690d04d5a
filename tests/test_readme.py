"""README.md is what CI runs: its Quickstart must hold exactly the two commands .ci/run takes."""

from __future__ import annotations

import subprocess

from tests.conftest import REPO

# The same extraction as .ci/run: the first two fenced blocks under "## Quickstart".
AWK = r"""
  /^## Quickstart/ { inside = 1; next }
  /^## / { inside = 0 }
  inside && /^```/ { fence = !fence; if (!fence) n++; next }
  inside && fence && NF { print }
"""


def test_the_quickstart_holds_exactly_the_two_commands_ci_runs():
    lines = subprocess.run(
        ["awk", AWK, str(REPO / "README.md")], capture_output=True, text=True, check=True
    ).stdout.splitlines()
    assert len(lines) == 2, lines  # any other code block belongs in another section
    assert lines[0].endswith("kablate run sweeps/quickstart.toml")
    assert lines[1].endswith("python -m pytest")
    assert "awk" in (REPO / ".ci" / "run").read_text()
