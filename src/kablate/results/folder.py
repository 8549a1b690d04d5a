"""A results folder read back: its recorded sweep, its plan, its data record and its trials.

`ResultsFolder` is what every reader (status, report, export) takes. It holds ``sweep.json``
(`meta`) and ``plan.json`` (`plan`), checked on opening, and reads the rest on request: the
resolved sweep as a `SweepSpec` (`sweep`), the data record as a
`DataRecord` (`data`). Its trials live in the
sweep's storage, which only `kablate.trials` opens: `kablate.trials.open_results` returns a
subclass that answers `rows` and `race` from the study. So report/ reads a results folder
without importing trials/.
"""

from __future__ import annotations

import json
from abc import ABC, abstractmethod
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from kablate.errors import UsageError
from kablate.results.data_record import DataRecord
from kablate.results.paths import DATA_FILE, PLAN_FILE, SEARCH_FILE, SWEEP_FILE
from kablate.spec.loader import sweep_from_dict
from kablate.spec.schema import SweepSpec
from kablate.spec.search import finalist_sweep

PLAN_KEYS = ("variants", "seeds", "baseline")  # what every reader of plan.json needs


def read_json(path: Path) -> Any:
    """A JSON object kablate wrote into a results folder.

    Raises:
        UsageError: the file is missing, damaged or not an object.
    """
    if not path.is_file():
        raise UsageError(f"{path} is missing: is {path.parent} a kablate results folder?")
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError, RecursionError) as exc:
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise UsageError(
            f"{path} is damaged ({reason[:120]}); `kablate run` with the same sweep file "
            "writes it again"
        ) from None
    if not isinstance(value, dict):
        raise UsageError(f"{path} is damaged (not a JSON object); `kablate run` writes it again")
    return value


def read_records(path: Path) -> tuple[dict, dict]:
    """``sweep.json`` and ``plan.json`` of the results folder ``path``, checked.

    Raises:
        UsageError: ``path`` is not a folder, or a file is missing, damaged or incomplete.
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
    return meta, plan


@dataclass
class ResultsFolder(ABC):
    """A results folder: ``path``, its ``sweep.json`` (``meta``) and ``plan.json`` (``plan``)."""

    path: Path
    meta: dict  # sweep.json
    plan: dict  # plan.json

    @property
    def name(self) -> str:
        return self.meta["name"]

    def sweep(self) -> SweepSpec:
        """The sweep as it was run: its resolved settings, loaded as the sweep file would be;
        for a ``[search]`` sweep, the finalists its search recorded (``search.json``)."""
        sweep = sweep_from_dict(self.meta["resolved"], Path(self.meta["source"]))
        record = self.search() if sweep.search is not None else None
        return finalist_sweep(sweep, record) if record else sweep

    def data(self) -> DataRecord:
        """The data record (``data.json``): source, sizes, split indices, scored labels.

        Raises:
            UsageError: the file is missing or damaged, or lacks a key.
        """
        path = self.path / DATA_FILE
        return DataRecord.from_dict(read_json(path), path)

    def search(self) -> dict | None:
        """What the search of a ``[search]`` sweep found (``search.json``), or None."""
        path = self.path / SEARCH_FILE
        return read_json(path) if path.is_file() else None

    @abstractmethod
    def rows(self) -> tuple[list[dict], list[dict]]:
        """The rows of trials.csv (with each trial's encoded predictions) and of curves.csv."""

    @abstractmethod
    def race(self) -> dict | None:
        """The race over seeds as the card tells it, or None when the sweep did not race."""

    @abstractmethod
    def halving(self) -> dict | None:
        """Successive halving's rule as the card tells it, or None when the sweep did not halve."""
