"""Open an existing results folder with the study it was run on.

`kablate.results.ResultsFolder` is the folder as every reader sees it; `StoredResults` adds the
study, from which it answers the trials' rows, the race and successive halving's rule.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import optuna

from kablate.errors import UsageError
from kablate.results.folder import ResultsFolder, read_records
from kablate.results.paths import SWEEP_FILE
from kablate.results.redact import strip_password
from kablate.trials.halving import halving_summary
from kablate.trials.race import race_summary
from kablate.trials.rows import collect_trials
from kablate.trials.store import STORAGE_ENV, open_study, resolve_url


@dataclass
class StoredResults(ResultsFolder):
    """A results folder and its study, opened read-only."""

    study: optuna.Study

    def rows(self) -> tuple[list[dict], list[dict]]:
        return collect_trials(self.study, self.plan)

    def race(self) -> dict | None:
        return race_summary(self.study)

    def halving(self) -> dict | None:
        return halving_summary(self.study)


def open_results(path: Path, storage: str | None = None) -> StoredResults:
    """Open ``path`` (a ``results/<name>`` folder) and the study it was run on.

    The storage is ``storage`` if given, else ``$KABLATE_STORAGE``, else the one recorded in
    ``sweep.json`` (a recorded PostgreSQL URL has no password: libpq finds it in
    ``PGPASSWORD`` or ``~/.pgpass``), else the folder's own journal file.
    """
    meta, plan = read_records(path)
    url = resolve_url(storage)
    if url is None and meta.get("storage_url"):
        # Without its password (an older folder may hold "***" in its place).
        url = strip_password(meta["storage_url"])
        try:
            return StoredResults(path, meta, plan, open_study(meta["name"], path, url, False))
        except UsageError as exc:
            raise UsageError(
                f"{exc}. {path / SWEEP_FILE} keeps the storage URL without its password: set "
                f"PGPASSWORD, add a line to ~/.pgpass, or give the whole URL in ${STORAGE_ENV} "
                "or --storage"
            ) from None
    return StoredResults(path, meta, plan, open_study(meta["name"], path, url, create=False))
