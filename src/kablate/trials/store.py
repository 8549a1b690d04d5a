"""Where a sweep's trials live: an Optuna study.

The default is embedded and needs no server: Optuna's journal file storage in
``results/<name>/study.journal`` (chosen over RDB-on-SQLite by the claim load test, see
tests/bench/bench_claim.py). ``--storage postgresql://...`` selects Optuna's RDB storage, which
is how several machines share one sweep; ``sqlite:///...`` is accepted for one machine.
Passwords are never written or printed: `kablate.results.redact` removes them, and libpq
reads ``PGPASSWORD`` or ``~/.pgpass``.

Liveness of a running trial is checked in one of two ways (see liveness.py):
- local storages (journal file, SQLite): a host-local ``flock`` per trial, held by its worker;
- server storages (PostgreSQL): Optuna's heartbeat, recorded by the worker, with a grace
  period after which the trial counts as abandoned.
"""

from __future__ import annotations

import importlib.util
import os
import re
import time
import warnings
from pathlib import Path

import optuna
from optuna.storages import JournalStorage, RDBStorage

from kablate.errors import UsageError
from kablate.results.paths import JOURNAL, LOCKS
from kablate.results.redact import redact
from kablate.trials.journal import GuardedJournal, ReadOnlyJournal
from kablate.trials.queue import requeue_lost

DIRECTIONS = ["maximize", "minimize"]  # validation accuracy ↑, MACs ↓
HEARTBEAT_SECONDS = 30
STORAGE_ENV = "KABLATE_STORAGE"
HEARTBEAT_ENV = "KABLATE_HEARTBEAT_SECONDS"  # shorter heartbeats for tests

optuna.logging.set_verbosity(optuna.logging.WARNING)


def resolve_url(url: str | None) -> str | None:
    """The storage URL from ``--storage`` or ``$KABLATE_STORAGE``; None for the default."""
    url = url or os.environ.get(STORAGE_ENV) or None
    if url and not re.match(r"^(postgresql|postgresql\+\w+|sqlite|mysql\+?\w*)://", url):
        raise UsageError(
            f"--storage must be a database URL such as postgresql://user@host/db or "
            f"sqlite:///path.db, but got {redact(url)}"
        )
    return url


def is_local(url: str | None) -> bool:
    """True for storages that only processes on one machine can share (journal, SQLite)."""
    return url is None or url.startswith("sqlite")


def lock_dir(results_dir: Path, url: str | None) -> Path:
    """Where the per-trial locks of a local storage live: beside the storage file."""
    if url and url.startswith("sqlite:///"):
        return Path(url[len("sqlite:///") :] + "." + LOCKS)
    return results_dir / LOCKS


def heartbeat_seconds() -> int:
    text = os.environ.get(HEARTBEAT_ENV, "")
    return int(text) if text.isdigit() and int(text) > 0 else HEARTBEAT_SECONDS


def engine_url(url: str) -> str:
    """``postgresql://`` with the driver that is installed.

    SQLAlchemy 2.1 maps a bare ``postgresql://`` to psycopg 3; the ``postgres`` extra installs
    psycopg2, so name that driver unless psycopg 3 is there.
    """
    if url.startswith("postgresql://") and importlib.util.find_spec("psycopg") is None:
        return "postgresql+psycopg2://" + url[len("postgresql://") :]
    return url


def open_storage(
    results_dir: Path, url: str | None, read_only: bool = False
) -> optuna.storages.BaseStorage:
    """The study's storage; the journal file is repaired first unless ``read_only`` (journal.py)."""
    if url is None:
        path = results_dir / JOURNAL
        return JournalStorage(ReadOnlyJournal(path) if read_only else GuardedJournal(path))
    for attempt in range(3):
        try:
            return _rdb_storage(url)
        except Exception as exc:  # sqlalchemy raises many kinds; all mean "cannot open"
            # Two machines starting at once may race to create the tables: the loser's
            # CREATE fails, and a second try finds them made.
            if attempt < 2 and "IntegrityError" in type(exc).__name__:
                time.sleep(1.0 + attempt)
                continue
            raise UsageError(
                f"cannot open storage {redact(url)}: {type(exc).__name__}: "
                f"{redact(str(exc)).splitlines()[0]}"
            ) from None
    raise AssertionError("unreachable")


def _rdb_storage(url: str) -> RDBStorage:
    if is_local(url):
        return RDBStorage(url)
    interval = heartbeat_seconds()
    warnings.filterwarnings("ignore", category=optuna.exceptions.ExperimentalWarning)
    # The search claims its proposals with `ask` and beats each trial's heartbeat itself
    # (liveness.HeartbeatLiveness); Optuna warns on every `ask` outside `Study.optimize` that the
    # heartbeat is meant for `optimize`: a line per proposal that no user can act on.
    warnings.filterwarnings(
        "ignore", message="Heartbeat of storage is supposed to be used", category=UserWarning
    )
    # Optuna fails a trial whose heartbeat is older than the grace period; the one process
    # whose update wins (SELECT ... FOR UPDATE) runs the callback, so a job is requeued once.
    return RDBStorage(
        engine_url(url),
        heartbeat_interval=interval,
        grace_period=3 * interval,
        heartbeat_stale_trial_callback=requeue_lost,
    )


def storage_exists(results_dir: Path, url: str | None) -> bool:
    """Whether a default journal exists (server storages are assumed to exist)."""
    return url is not None or (results_dir / JOURNAL).is_file()


def open_study(name: str, results_dir: Path, url: str | None, create: bool = True) -> optuna.Study:
    """Open (or create) the sweep's study. Every trial is one (variant, seed).

    Without ``create`` the study is only read: a journal file is not written to, not even to
    repair a torn tail (`status` and `report` may run beside a live run, or on a full disk).
    """
    storage = open_storage(results_dir, url, read_only=not create)
    if create:
        return optuna.create_study(
            study_name=name,
            storage=storage,
            directions=DIRECTIONS,
            load_if_exists=True,
            sampler=optuna.samplers.NSGAIISampler(seed=0),
        )
    try:
        return optuna.load_study(
            study_name=name, storage=storage, sampler=optuna.samplers.NSGAIISampler(seed=0)
        )
    except KeyError:
        raise UsageError(
            f"no sweep named {name} in storage {redact(url) if url else results_dir / JOURNAL}"
        ) from None
