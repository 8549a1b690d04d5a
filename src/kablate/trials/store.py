"""Where a sweep's trials live: an Optuna study.

The default is embedded and needs no server: Optuna's journal file storage in
``results/<name>/study.journal``. ``--storage postgresql://...`` (or ``sqlite:///...``) selects
Optuna's RDB storage, which is how several machines share one sweep. Passwords are never
written or printed: `redact` removes them, and libpq reads ``PGPASSWORD`` or ``~/.pgpass``.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import optuna
from optuna.storages import JournalStorage, RDBStorage
from optuna.storages.journal import JournalFileBackend

from kablate.errors import UsageError

JOURNAL = "study.journal"
DIRECTIONS = ["maximize", "minimize"]  # validation accuracy ↑, MACs ↓
HEARTBEAT_SECONDS = 30
STORAGE_ENV = "KABLATE_STORAGE"

optuna.logging.set_verbosity(optuna.logging.WARNING)


def redact(url: str) -> str:
    """The URL with any password replaced by ``***``."""
    return re.sub(r"(://[^:/@]+):[^@]*@", r"\1:***@", url)


def resolve_url(url: str | None) -> str | None:
    """The storage URL from ``--storage`` or ``$KABLATE_STORAGE``; None for the default."""
    url = url or os.environ.get(STORAGE_ENV) or None
    if url and not re.match(r"^(postgresql|postgresql\+\w+|sqlite|mysql\+?\w*)://", url):
        raise UsageError(
            f"--storage must be a database URL such as postgresql://user@host/db or "
            f"sqlite:///path.db, but got {redact(url)}"
        )
    return url


def open_storage(results_dir: Path, url: str | None) -> optuna.storages.BaseStorage:
    if url is None:
        results_dir.mkdir(parents=True, exist_ok=True)
        return JournalStorage(JournalFileBackend(str(results_dir / JOURNAL)))
    try:
        return RDBStorage(
            url, heartbeat_interval=HEARTBEAT_SECONDS, grace_period=4 * HEARTBEAT_SECONDS
        )
    except Exception as exc:  # sqlalchemy raises many kinds; all mean "cannot connect"
        raise UsageError(
            f"cannot open storage {redact(url)}: {type(exc).__name__}: "
            f"{redact(str(exc)).splitlines()[0]}"
        ) from None


def open_study(name: str, results_dir: Path, url: str | None, create: bool = True) -> optuna.Study:
    """Open (or create) the sweep's study. Every trial is one (variant, seed)."""
    storage = open_storage(results_dir, url)
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
