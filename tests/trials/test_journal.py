"""The journal file survives a torn write: readers tolerate it, a run repairs it (journal.py)."""

from __future__ import annotations

import errno
import json
from pathlib import Path

import optuna
import pytest
from optuna.storages import JournalStorage
from optuna.storages.journal import JournalFileBackend
from optuna.trial import TrialState

import kablate.trials.journal as journal
from kablate.errors import DiskFullError
from kablate.trials.jobs import Job
from kablate.trials.liveness import liveness_for
from kablate.trials.queue import claim_next, enqueue_missing
from kablate.trials.store import JOURNAL, lock_dir, open_study

GARBAGE = b"\xff\xfe not a record\n"  # Optuna's reader raises UnicodeDecodeError on it


def record(n: int) -> bytes:
    return json.dumps({"op_code": 5, "worker_id": "w", "n": n}, separators=(",", ":")).encode()


def test_scan_keeps_whole_records_cuts_garbage_and_salvages_a_record_glued_onto_a_torn_one():
    torn = record(2)[:-9]
    data = record(1) + b"\n" + GARBAGE + torn + record(3) + b"\n" + record(4)[:5]
    scan = journal.scan_journal(data)
    assert [r["n"] for r in scan.records] == [1, 3]
    assert [data[a:b] for a, b in scan.cut] == [GARBAGE, torn]
    assert scan.tail == 5 and scan.end == len(data) - 5
    assert not scan.clean


def test_a_journal_of_whole_records_is_clean():
    scan = journal.scan_journal(record(1) + b"\n" + record(2) + b"\n")
    assert scan.clean and [r["n"] for r in scan.records] == [1, 2]


def half_done_study(folder: Path) -> Path:
    """A real study: 4 jobs enqueued, 2 claimed and finished. Its journal's path."""
    study = open_study("torn", folder, None)
    enqueue_missing(study, [Job(f"v{i}", f"p{i}", 0) for i in range(4)])
    liveness = liveness_for(study, lock_dir(folder, None))
    for _ in range(2):
        claim = claim_next(study, liveness)
        study.tell(claim.trial, values=[0.5, 1.0])
        liveness.release(claim.token)
    return folder / JOURNAL


def states(study: optuna.Study) -> list[str]:
    return [t.state.name for t in study.get_trials()]


@pytest.mark.parametrize(
    "damage",
    [
        pytest.param(lambda data: data[:-40], id="cut-mid-record"),
        pytest.param(lambda data: data + GARBAGE, id="garbage-line"),
        pytest.param(lambda data: data[:-40] + GARBAGE + b"{", id="both"),
    ],
)
def test_readers_tolerate_a_damaged_tail_and_a_run_repairs_it(tmp_path, damage, caplog):
    path = half_done_study(tmp_path)
    whole = path.read_bytes()
    path.write_bytes(damage(whole))
    damaged = path.read_bytes()
    last_newline = whole.rstrip(b"\n").rfind(b"\n") + 1
    kept = whole if damaged.startswith(whole) else whole[:last_newline]

    reader = open_study("torn", tmp_path, None, create=False)
    seen = states(reader)
    assert seen.count("COMPLETE") >= 1 and len(seen) == 4
    assert path.read_bytes() == damaged  # the reader wrote nothing

    with caplog.at_level("WARNING", logger="kablate"):
        study = open_study("torn", tmp_path, None)
    assert states(study) == seen
    repaired = path.read_bytes()  # the kept records, then what opening the study appended
    assert repaired.startswith(kept) and journal.scan_journal(repaired).clean
    (side,) = tmp_path.glob(JOURNAL + ".torn-*")
    assert kept + side.read_bytes() == damaged
    assert side.name in caplog.text
    # Plain Optuna reads the repaired file, and the study goes on.
    storage = JournalStorage(JournalFileBackend(str(path)))
    plain = optuna.load_study(study_name="torn", storage=storage)
    assert states(plain) == seen


def test_a_repaired_study_finishes_every_job_exactly_once(tmp_path):
    path = half_done_study(tmp_path)
    path.write_bytes(path.read_bytes()[:-40])  # the second trial's tell is torn: it stays RUNNING
    study = open_study("torn", tmp_path, None)
    liveness = liveness_for(study, lock_dir(tmp_path, None))
    liveness.recover(study)  # what a run does first: no live worker holds it, so it is requeued
    while (claim := claim_next(study, liveness)) is not None:
        study.tell(claim.trial, values=[0.5, 1.0])
        liveness.release(claim.token)
    done = [t.user_attrs["job"] for t in study.get_trials() if t.state == TrialState.COMPLETE]
    assert sorted(done) == [f"v{i}-s0" for i in range(4)]


class FullDisk:
    """A file whose ``write`` gets half of the bytes out, then fails as on a full disk."""

    def __init__(self, fh):
        self.fh = fh

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.fh.close()

    def write(self, data: bytes) -> int:
        self.fh.write(data[: len(data) // 2])
        self.fh.flush()
        raise OSError(errno.ENOSPC, "No space left on device")


def test_an_append_cut_short_by_a_full_disk_is_taken_back(tmp_path, monkeypatch):
    path = half_done_study(tmp_path)
    study = open_study("torn", tmp_path, None)
    before = path.read_bytes()

    def open_full(file, mode):
        return FullDisk(open(file, mode)) if "a" in mode else open(file, mode)

    monkeypatch.setattr(journal, "open", open_full, raising=False)
    with pytest.raises(DiskFullError, match="disk full at .*study.journal"):
        study.set_user_attr("note", "x" * 1000)
    assert path.read_bytes() == before
    monkeypatch.undo()
    study.set_user_attr("note", "fits now")
    assert open_study("torn", tmp_path, None, create=False).user_attrs["note"] == "fits now"


def test_an_append_after_a_writer_died_mid_record_cuts_the_torn_bytes_first(tmp_path):
    path = half_done_study(tmp_path)
    study = open_study("torn", tmp_path, None)
    with path.open("ab") as fh:
        fh.write(record(9)[:20])  # a writer killed mid-record, after this process opened
    study.set_user_attr("note", "after")
    assert journal.scan_journal(path.read_bytes()).clean
    (side,) = tmp_path.glob(JOURNAL + ".torn-*")
    assert side.read_bytes() == record(9)[:20]
