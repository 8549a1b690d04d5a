"""The journal file (``study.journal``): Optuna's append-only log of the study, kept readable.

Each record is one line of JSON, an object whose first key is ``op_code``, ended by ``\\n``.
Optuna appends a record under a lock file and replays the lines in order; a line that is not a
whole record makes every later read fail. A write cut short (a full disk, a killed process, a
power cut) leaves such a line at the end, and the next append glues a record onto it.

What kablate adds, so that a torn write never costs the study:

- `GuardedJournal` (runs and their workers): under Optuna's lock, an append first cuts a torn
  tail away (`repair_journal`), and an append that fails part-way is truncated back to where
  it started, so no half record stays behind for the next one to glue onto.
- `repair_journal`, when a run opens the journal: every line that is not a whole record is cut
  out and kept in a side file ``study.journal.torn-<UTC time>``; a whole record glued onto a torn
  one is kept. A tail-only repair truncates in place; anything else rewrites the file.
- `ReadOnlyJournal` (``status``, ``report``, ``--dry-run``): reads the same records the repair
  would keep, never writes, and waits for an unfinished last line to be completed. Runs read
  through it too, so every process numbers the records alike.

Guaranteed: every record that was fully written (and fsync'ed) stays. Not guaranteed: the
operation whose record was torn (it failed in the process that wrote it, which saw the error),
and anything written by a program that does not take Optuna's lock.
"""

from __future__ import annotations

import json
import logging
import os
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from optuna.storages.journal import BaseJournalBackend, JournalFileSymlinkLock

from kablate.errors import DiskFullError, is_disk_full
from kablate.results.write import atomic_write

log = logging.getLogger("kablate")

RECORD_START = b'{"op_code"'  # json.dumps of Optuna's records; cannot occur inside a string
TORN_SUFFIX = ".torn-"


def parse_record(line: bytes) -> dict | None:
    """The record in one ``\\n``-ended line, or None when the line is not a whole record."""
    try:
        value = json.loads(line)
    except ValueError:  # JSONDecodeError, and UnicodeDecodeError for bytes that are not UTF-8
        return None
    return value if isinstance(value, dict) and "op_code" in value else None


def salvage(line: bytes) -> tuple[int, dict] | None:
    """(offset, record) of a whole record glued onto the end of a torn one, or None."""
    start = line.find(RECORD_START, 1)
    while start != -1:
        record = parse_record(line[start:])
        if record is not None:
            return start, record
        start = line.find(RECORD_START, start + 1)
    return None


@dataclass
class Scan:
    """The journal's bytes split into what a reader keeps and what a repair cuts."""

    records: list[dict] = field(default_factory=list)
    kept: list[tuple[int, int]] = field(default_factory=list)  # byte spans of whole records
    cut: list[tuple[int, int]] = field(default_factory=list)  # byte spans of torn bytes
    end: int = 0  # bytes read through (an unfinished last line is not read)
    tail: int = 0  # bytes after ``end``: an unfinished last line

    @property
    def clean(self) -> bool:
        return not self.cut and not self.tail


def scan_journal(data: bytes) -> Scan:
    """Split ``data`` into whole records, torn bytes and an unfinished last line."""
    scan = Scan()
    pos = 0
    while pos < len(data):
        newline = data.find(b"\n", pos)
        if newline == -1:
            scan.tail = len(data) - pos
            break
        line = data[pos : newline + 1]
        record = parse_record(line)
        if record is not None:
            scan.records.append(record)
            scan.kept.append((pos, newline + 1))
        else:
            glued = salvage(line)
            if glued is None:
                scan.cut.append((pos, newline + 1))
            else:
                scan.cut.append((pos, pos + glued[0]))
                scan.records.append(glued[1])
                scan.kept.append((pos + glued[0], newline + 1))
        pos = newline + 1
    scan.end = pos
    return scan


@contextmanager
def journal_lock(path: Path) -> Iterator[None]:
    """The lock Optuna's `JournalFileBackend` takes for ``path`` by default: one writer at once."""
    lock = JournalFileSymlinkLock(str(path))
    lock.acquire()
    try:
        yield
    finally:
        lock.release()


def repair_journal(path: Path) -> Path | None:
    """Cut torn or unreadable records out of ``path``; the side file they went to, or None.

    The caller holds `journal_lock`, so no append runs meanwhile. Only whole records stay, so
    the numbering of records (which is all a reader keeps) does not change.
    """
    data = path.read_bytes() if path.is_file() else b""
    scan = scan_journal(data)
    if scan.clean:
        return None
    torn = b"".join(data[a:b] for a, b in scan.cut) + data[scan.end :]
    side = side_file(path)
    side.write_bytes(torn)
    last = scan.kept[-1][1] if scan.kept else 0
    if all(a >= last for a, _ in scan.cut):
        os.truncate(path, last)  # in place: a reader's offsets stay valid
    else:
        atomic_write(path, lambda fh: fh.write(b"".join(data[a:b] for a, b in scan.kept)))
    log.warning(
        "%s held %d bytes of torn or unreadable records (a write cut short by a full disk or a "
        "crash): cut them out and kept them in %s; the study continues from its %d whole "
        "records",
        path.name,
        len(torn),
        side.name,
        len(scan.records),
    )
    return side


def side_file(path: Path) -> Path:
    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    side = path.with_name(f"{path.name}{TORN_SUFFIX}{stamp}")
    n = 1
    while side.exists():
        n += 1
        side = path.with_name(f"{path.name}{TORN_SUFFIX}{stamp}-{n}")
    return side


class ReadOnlyJournal(BaseJournalBackend):
    """The journal's whole records, read without writing; an unfinished last line waits.

    Records are numbered by whole records only, so a repair (which removes only what is not a
    whole record) keeps every number; a rewritten file (a new inode) is read again from the start.
    """

    def __init__(self, path: Path) -> None:
        self.path = path
        self._inode = None
        self._offset = 0  # bytes read through
        self._n_read = 0  # whole records before ``_offset``

    def read_logs(self, log_number_from: int) -> Iterator[dict[str, Any]]:
        if not self.path.is_file():
            return iter(())
        with open(self.path, "rb") as fh:
            stat = os.fstat(fh.fileno())
            if stat.st_ino != self._inode or stat.st_size < self._offset:
                self._inode, self._offset, self._n_read = stat.st_ino, 0, 0
            fh.seek(self._offset)
            data = fh.read()
        scan = scan_journal(data)
        first = self._n_read
        self._offset += scan.end
        self._n_read += len(scan.records)
        return iter(scan.records[max(0, log_number_from - first) :])

    def append_logs(self, logs: list[dict[str, Any]]) -> None:
        raise AssertionError(f"{self.path} was opened read-only")


class GuardedJournal(ReadOnlyJournal):
    """The journal of a run: repaired when opened; an append never leaves a torn record."""

    def __init__(self, path: Path) -> None:
        super().__init__(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        with journal_lock(path):
            path.touch()
            repair_journal(path)

    def append_logs(self, logs: list[dict[str, Any]]) -> None:
        text = "".join(json.dumps(entry, separators=(",", ":")) + "\n" for entry in logs)
        try:
            with journal_lock(self.path):
                size = self.path.stat().st_size
                if size and not ends_with_newline(self.path, size):
                    repair_journal(self.path)  # a writer died mid-record
                    size = self.path.stat().st_size
                try:
                    with open(self.path, "ab") as fh:
                        fh.write(text.encode("utf-8"))
                        fh.flush()
                        os.fsync(fh.fileno())
                except OSError:
                    os.truncate(self.path, size)  # take back a part-written record; needs no space
                    raise
        except OSError as exc:
            if is_disk_full(exc):
                raise DiskFullError(self.path) from exc
            raise


def ends_with_newline(path: Path, size: int) -> bool:
    with open(path, "rb") as fh:
        fh.seek(size - 1)
        return fh.read(1) == b"\n"
