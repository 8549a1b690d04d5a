"""Processes that share one search study, for tests: a synthetic objective (no training) over
27 plans, written down as it is trained, so that a test can tell what trained to the end and
how often. A plain helper module, started by `multiprocessing` in a fresh interpreter; it also
builds a search stopped in its search phase (`stopped_search`)."""

from __future__ import annotations

import os
import signal
import time
from pathlib import Path

from optuna.trial import TrialState

from kablate.costs.screen import Screen
from kablate.trials.liveness import liveness_for
from kablate.trials.search import plan_key, search_front, search_study
from kablate.trials.search_run import search_study_name
from kablate.trials.store import lock_dir, open_storage

CHOICES = {group: ("3", "5", "7") for group in ("stem", "stage1", "stage2")}
STUDY = "shared.search"


def screen(plan: dict[str, str]) -> Screen:
    """Synthetic MACs: each conv's grows with k², as a dense conv's does."""
    return Screen(plan_key(plan), float(sum(int(k) ** 2 for k in plan.values())))


def accuracy_of(plan: dict[str, str]) -> float:
    return 0.8 + sum(0.03 * (1 - 3 / int(k)) for k in plan.values())


def search_worker(
    folder: str, url: str | None, budget: int, seconds: float, die_at: int = 0
) -> None:
    """Search the shared study until it is done; every plan trained to the end is one line of
    ``<folder>/trained-<pid>``. With ``die_at``, SIGKILL this process halfway through the
    training of its ``die_at``-th plan (nothing is told: what a kill leaves)."""
    results = Path(folder)
    study = search_study(
        None, 4, storage=open_storage(results, url), study_name=STUDY, load_if_exists=True
    )
    liveness = liveness_for(study, lock_dir(results, url) / "search")
    log = results / f"trained-{os.getpid()}"
    n_started = 0

    def score(plan: dict[str, str]) -> float:
        nonlocal n_started
        n_started += 1
        time.sleep(seconds / 2)
        if n_started == die_at:
            os.kill(os.getpid(), signal.SIGKILL)
        time.sleep(seconds / 2)
        with log.open("a") as f:
            f.write(plan_key(plan) + "\n")
        return accuracy_of(plan)

    search_front(CHOICES, screen, score, budget, study=study, liveness=liveness)


def trained_keys(folder: Path) -> list[str]:
    """Every plan trained to the end, by any process, as many times as it was."""
    return [line for f in sorted(folder.glob("trained-*")) for line in f.read_text().splitlines()]


class Stopped(Exception):
    """Raised by `stopped_search`'s objective: the run stops here, its trial left RUNNING."""


def stopped_search(folder: Path, name: str, budget: int, n_trained: int, url: str | None = None):
    """The search study ``<name>.search`` in ``url`` (None: ``folder``'s journal), stopped in its
    search phase:
    ``n_trained`` of ``budget`` plans trained and one more in training, as a kill leaves it
    (its trial RUNNING and claimed, the other slots' tickets WAITING). Returns the study."""
    study = search_study(
        0, 4, storage=open_storage(folder, url), study_name=search_study_name(name)
    )

    def score(plan: dict[str, str]) -> float:
        if len(study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))) == n_trained:
            raise Stopped
        return accuracy_of(plan)

    try:
        search_front(CHOICES, screen, score, budget, study=study)
    except Stopped:
        return study
    raise AssertionError(f"the search trained all {budget} plans")
