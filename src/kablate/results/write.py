"""The one writer of a results folder: a crash or a full disk leaves the old file or the new one.

Every file kablate writes into a results folder (tables, JSON records, checkpoints, the model
card, a repaired journal) goes through `atomic_write`: the content goes to a new temporary
file beside the target, is flushed to disk, and is then renamed over the target, which POSIX
makes atomic. A reader never sees half a file. The temporary file is created like any other
(its mode follows the umask), and removed when the write fails.
"""

from __future__ import annotations

import csv
import io
import json
import os
import secrets
import tempfile
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any, BinaryIO

from kablate.errors import UsageError


def _create_temp(path: Path) -> tuple[Path, int]:
    """A new, empty file beside ``path`` (a name no one else holds) and its descriptor."""
    for _ in range(100):
        tmp = path.with_name(f"{path.name}.{secrets.token_hex(4)}.tmp")
        try:
            return tmp, os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            continue
    raise FileExistsError(f"no free temporary name beside {path}")


def atomic_write(path: Path, write: Callable[[BinaryIO], object]) -> None:
    """Call ``write`` on a temp file beside ``path``, fsync it, then rename it over ``path``."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp, fd = _create_temp(path)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_text(path: Path, text: str) -> None:
    """``text`` as UTF-8."""
    atomic_write(path, lambda fh: fh.write(text.encode("utf-8")))


def write_json(path: Path, value: Any) -> None:
    """``value`` as indented JSON (what json cannot write becomes its ``str``)."""
    write_text(path, json.dumps(value, indent=1, sort_keys=False, default=str) + "\n")


def write_csv(path: Path, rows: Iterable[dict], columns: tuple[str, ...]) -> None:
    """One line per row, ``columns`` in that order (other keys left out, None empty)."""
    text = io.StringIO()
    writer = csv.DictWriter(text, fieldnames=columns, extrasaction="ignore", lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: ("" if row.get(k) is None else row.get(k)) for k in columns})
    write_text(path, text.getvalue())


def writable_folder(path: Path, what: str, hint: str = "") -> Path:
    """Create ``path`` if needed and check that a file can be written in it.

    Raises:
        UsageError: ``path`` is a file, or the folder cannot be created or written (read-only
            file system, no permission); ``hint`` is added to the message.
    """
    if path.exists() and not path.is_dir():
        raise UsageError(f"{what} {path} is a file, not a folder{hint}")
    try:
        path.mkdir(parents=True, exist_ok=True)
        with tempfile.NamedTemporaryFile(dir=path, prefix=".kablate-write-check-"):
            pass
    except OSError as exc:
        raise UsageError(f"{what} {path} cannot be written ({exc.strerror or exc}){hint}") from None
    return path
