"""Open an existing results folder: its recorded sweep, its plan, and its study."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import optuna

from kablate.errors import UsageError
from kablate.trials.export import collect_trials
from kablate.trials.meta import read_json
from kablate.trials.store import STORAGE_ENV, open_study, resolve_url, strip_password

SWEEP_FILE = "sweep.json"
PLAN_FILE = "plan.json"
DATA_FILE = "data.json"
PLAN_KEYS = ("variants", "seeds", "baseline")  # what every reader of plan.json needs


@dataclass
class ResultsFolder:
    path: Path
    meta: dict  # sweep.json
    plan: dict  # plan.json
    study: optuna.Study

    def rows(self) -> tuple[list[dict], list[dict]]:
        return collect_trials(self.study, self.plan)

    @property
    def name(self) -> str:
        return self.meta["name"]


def open_results(path: Path, storage: str | None = None) -> ResultsFolder:
    """Open ``path`` (a ``results/<name>`` folder) and the study it was run on.

    The storage is ``storage`` if given, else ``$KABLATE_STORAGE``, else the one recorded in
    ``sweep.json`` (a recorded PostgreSQL URL has no password: libpq finds it in
    ``PGPASSWORD`` or ``~/.pgpass``), else the folder's own journal file.
    """
    if not path.is_dir():
        raise UsageError(
            f"{path} is not a folder; give a results folder such as results/quickstart"
        )
    meta = read_json(path / SWEEP_FILE)
    plan = read_json(path / PLAN_FILE)
    for file, content, keys in ((SWEEP_FILE, meta, ("name",)), (PLAN_FILE, plan, PLAN_KEYS)):
        missing = [k for k in keys if k not in content]
        if missing:
            raise UsageError(
                f"{path / file} lacks {', '.join(f'`{k}`' for k in missing)}: it was not written "
                "by kablate run, or was edited; kablate run with the same sweep file writes it "
                "again"
            )
    url = resolve_url(storage)
    if url is None and meta.get("storage_url"):
        # Without its password (an older folder may hold "***" in its place).
        url = strip_password(meta["storage_url"])
        try:
            return ResultsFolder(path, meta, plan, open_study(meta["name"], path, url, False))
        except UsageError as exc:
            raise UsageError(
                f"{exc}. {path / SWEEP_FILE} keeps the storage URL without its password: set "
                f"PGPASSWORD, add a line to ~/.pgpass, or give the whole URL in ${STORAGE_ENV} "
                "or --storage"
            ) from None
    return ResultsFolder(path, meta, plan, open_study(meta["name"], path, url, create=False))
