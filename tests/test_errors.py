"""The errors kablate raises on purpose: their exit codes are those of README.md's exit-code
table, a full disk is told apart by its errno (POSIX ENOSPC, EDQUOT), and messages name the
file, the line and the key."""

from __future__ import annotations

import errno
import re
from pathlib import Path

import pytest

from kablate.errors import (
    EXIT_DISK_FULL,
    EXIT_ERROR,
    EXIT_OK,
    EXIT_STOPPED,
    EXIT_TRIALS,
    EXIT_USAGE,
    DataError,
    DiskFullError,
    KablateError,
    PlanError,
    SweepError,
    UsageError,
    did_you_mean,
    is_disk_full,
)

README = Path(__file__).resolve().parents[1] / "README.md"


def readme_exit_codes() -> dict[int, str]:
    """code → meaning, from the table under README.md's "Exit codes" heading."""
    section = README.read_text(encoding="utf-8").split("### Exit codes", 1)[1].split("###")[0]
    return {int(m[1]): m[2] for m in re.finditer(r"^\| (\d+) \| ([^|]+)\|", section, re.M)}


def test_the_exit_codes_are_those_the_readme_documents():
    table = readme_exit_codes()
    assert set(table) == {
        EXIT_OK,
        EXIT_ERROR,
        EXIT_USAGE,
        EXIT_TRIALS,
        EXIT_DISK_FULL,
        EXIT_STOPPED,
    }
    assert "bad input" in table[EXIT_USAGE] and "internal error" in table[EXIT_ERROR]
    assert "disk" in table[EXIT_DISK_FULL] and "Ctrl-C" in table[EXIT_STOPPED]
    for cls in (UsageError, SweepError, PlanError, DataError):
        assert issubclass(cls, KablateError) and cls.exit_code == EXIT_USAGE
    assert KablateError.exit_code == EXIT_ERROR and DiskFullError.exit_code == EXIT_DISK_FULL


def test_a_full_disk_or_quota_is_told_apart_from_other_os_errors():
    assert is_disk_full(OSError(errno.ENOSPC, "No space left on device"))
    assert is_disk_full(OSError(errno.EDQUOT, "Disk quota exceeded"))
    assert not is_disk_full(OSError(errno.EACCES, "Permission denied"))
    assert not is_disk_full(ValueError("no space"))
    message = str(DiskFullError("results/x/checkpoint.pt", "2 MiB needed"))
    assert message == (
        "disk full at results/x/checkpoint.pt (2 MiB needed): free space and rerun the same command"
    )


def test_a_sweep_error_names_the_file_the_line_and_the_key():
    assert str(SweepError("sweeps/x.toml", "recipe.epochs", "must be ≥ 1, but got 0")) == (
        "sweeps/x.toml: `recipe.epochs` must be ≥ 1, but got 0"
    )
    assert str(SweepError("sweeps/x.toml", "", "is not TOML", line=3)) == (
        "sweeps/x.toml, line 3: is not TOML"
    )


@pytest.mark.parametrize(
    ("word", "expected"),
    [
        ("epcohs", "; did you mean `epochs`?"),
        ("zzz", ""),
        ("batchsize", "; did you mean `batch_size`?"),
    ],
)
def test_did_you_mean_offers_the_closest_key_or_nothing(word, expected):
    assert did_you_mean(word, ["epochs", "batch_size", "lr"]) == expected
