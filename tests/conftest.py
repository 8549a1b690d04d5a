"""Shared fixtures: tiny sweep files written into a temp folder."""

from __future__ import annotations

import re
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent

TINY_NETWORK = """
kernel = "3"
norm = "batch"
padding = "same"

[stem]
out_ch = 8

[[stages]]
out_ch = 8
n_convs = 1

[[stages]]
out_ch = 16
n_convs = 1
down = "maxpool"
"""

TINY_RECIPE = """
epochs = 2
batch_size = 64
lr = 0.05
"""


def write_sweep(folder: Path, body: str, name: str = "tiny") -> Path:
    """Write a sweep file plus a tiny network and recipe it can include."""
    (folder / "configs").mkdir(exist_ok=True)
    (folder / "configs" / "tiny-net.toml").write_text(TINY_NETWORK)
    (folder / "configs" / "tiny-recipe.toml").write_text(TINY_RECIPE)
    path = folder / f"{name}.toml"
    path.write_text(textwrap.dedent(body))
    return path


TINY_SWEEP = """
[sweep]
name = "tiny"
seeds = [0, 1]

[data]
source = "digits"
train_size = 200
val_size = 100
test_size = 100

[network]
from = "configs/tiny-net.toml"

[recipe]
from = "configs/tiny-recipe.toml"

[[plan]]
name = "all-3"
body = "3"

[[plan]]
name = "stem-5"
stem = "5"
"""


@pytest.fixture
def tiny_sweep(tmp_path: Path) -> Path:
    return write_sweep(tmp_path, TINY_SWEEP)


STEP_LINE = re.compile(r"^\d{4}-\d\d-\d\d \d\d:\d\d:\d\d INFO ")  # kablate.console's progress


def the_error_line(output: str) -> str:
    """The one ``error:`` line of a refused command, which must end its output; every line
    before it is a timestamped progress line (a command is never silent while it works)."""
    lines = output.splitlines()
    assert lines and lines[-1].startswith("error: "), output
    assert all(STEP_LINE.match(line) for line in lines[:-1]), output
    assert "Traceback" not in output
    return lines[-1]


def kablate(*args: str, cwd=REPO) -> subprocess.CompletedProcess:
    """Run the kablate command line in a child process, as a user would."""
    return subprocess.run(
        [sys.executable, "-m", "kablate", *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        timeout=300,
    )


TINY_PLANS = TINY_SWEEP[TINY_SWEEP.index("[[plan]]") :]
TINY_SEARCH = """
[search]
budget = 3

[search.choices]
stem = ["3", "5"]
stage1 = ["3", "5", "3:stack"]
stage2 = ["3", "3:depthwise"]
"""


def search_sweep(tmp_path, search=TINY_SEARCH, extra=""):
    """The tiny sweep with a [search] space (2 × 3 × 2 = 12 plans, budget 3) for its plans."""
    return write_sweep(tmp_path, TINY_SWEEP.replace(TINY_PLANS, search + extra))
