"""The one writer of a results folder (results/write.py)."""

from __future__ import annotations

import csv
import errno
import json
import os
import stat

import pytest

from kablate.results.write import atomic_write, write_csv, write_json


def test_a_failed_write_leaves_the_old_file_and_no_temporary(tmp_path):
    path = tmp_path / "trials.csv"
    path.write_text("old\n")

    def fails(fh):
        fh.write(b"half")
        raise OSError(errno.ENOSPC, "No space left on device")

    with pytest.raises(OSError):
        atomic_write(path, fails)
    assert path.read_text() == "old\n"
    assert [p.name for p in tmp_path.iterdir()] == ["trials.csv"]


def test_the_new_file_takes_the_mode_of_a_plain_open(tmp_path):
    # A plain open() creates 0o666 less the umask (POSIX open(2)); the writer's file does too.
    umask = os.umask(0o022)
    os.umask(umask)
    atomic_write(tmp_path / "a", lambda fh: fh.write(b"x"))
    (tmp_path / "b").write_bytes(b"x")
    mode = stat.S_IMODE((tmp_path / "a").stat().st_mode)
    assert mode == stat.S_IMODE((tmp_path / "b").stat().st_mode) == 0o666 & ~umask


def test_csv_and_json_read_back_with_the_standard_parsers(tmp_path):
    rows = [{"variant": "all-3", "seed": 0, "val_acc": None, "extra": 1}]
    write_csv(tmp_path / "t.csv", rows, ("variant", "seed", "val_acc"))
    with (tmp_path / "t.csv").open(newline="") as fh:
        assert list(csv.DictReader(fh)) == [{"variant": "all-3", "seed": "0", "val_acc": ""}]
    assert (tmp_path / "t.csv").read_bytes().endswith(b"\n")
    write_json(tmp_path / "x.json", {"path": tmp_path, "n": 1})
    assert json.loads((tmp_path / "x.json").read_text()) == {"path": str(tmp_path), "n": 1}
