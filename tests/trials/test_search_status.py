"""`kablate status` on a [search] sweep: the search's counts, front and hypervolume, checked
against Optuna's own view of the same study (its states, `Study.best_trials`, and
`optuna._hypervolume.compute_hypervolume`), after the search and midway through it."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
from datetime import datetime

import numpy as np
import optuna
import pytest
from optuna._hypervolume import compute_hypervolume
from optuna.trial import TrialState

from kablate.trials.search import search_front, search_study
from kablate.trials.search_status import search_line, search_status
from tests.trials.search_workers import CHOICES, accuracy_of, screen, stopped_search


def test_the_search_status_agrees_with_optuna(tmp_path):
    storage = optuna.storages.RDBStorage(f"sqlite:///{tmp_path / 's.db'}")
    assert search_status(storage, "tiny") is None  # no search study: nothing to say
    study = search_study(0, 4, storage=storage, study_name="tiny.search")
    search_front(CHOICES, screen, accuracy_of, budget=8, study=study)

    found = search_status(storage, "tiny")
    complete = study.get_trials(states=(TrialState.COMPLETE,))
    assert (found.budget, found.n_trained, found.n_training) == (8, len(complete), 0) == (8, 8, 0)
    assert found.n_proposed == sum("key" in t.user_attrs for t in study.trials)
    # kablate's front keeps one of several plans with equal (accuracy, cost) (analysis/pareto.py)
    assert found.n_front == len({tuple(t.values) for t in study.best_trials})
    # Optuna minimises: (−accuracy, cost) against the reference (−0, largest cost)
    losses = np.array([[-t.values[0], t.values[1]] for t in complete])
    reference = np.array([0.0, max(t.values[1] for t in complete)])
    assert found.hypervolume == pytest.approx(compute_hypervolume(losses, reference))
    assert found.reference == {"accuracy": 0.0, "cost": reference[1]}
    line = search_line(found)[0]
    assert "8/8 plans trained" in line and f"{found.n_front} on the front" in line


def test_a_search_stopped_midway_shows_its_plans_trained_and_the_one_in_training(tmp_path):
    study = stopped_search(tmp_path, "tiny", budget=8, n_trained=3)
    now = datetime.now()
    found = search_status(study._storage, "tiny", now)  # noqa: SLF001

    complete = study.get_trials(states=(TrialState.COMPLETE,))
    running = study.get_trials(states=(TrialState.RUNNING,))
    assert (found.budget, found.n_trained, found.n_training) == (8, len(complete), len(running))
    assert (found.n_trained, found.n_training) == (3, 1)
    assert found.n_proposed == sum("key" in t.user_attrs for t in study.trials)
    assert found.n_front == len({tuple(t.values) for t in study.best_trials})
    losses = np.array([[-t.values[0], t.values[1]] for t in complete])
    reference = np.array([0.0, max(t.values[1] for t in complete)])
    assert found.hypervolume == pytest.approx(compute_hypervolume(losses, reference))
    # The plan in training, named as a grid cell is, by the process that popped it (this one).
    (entry,) = found.training
    assert entry["plan"] == "+".join(f"{g}={running[0].params[g]}" for g in CHOICES)
    assert entry["worker"] == f"{socket.gethostname()}:{os.getpid()}" and entry["alive"] is True
    assert entry["seconds"] == pytest.approx(
        (now - running[0].datetime_start).total_seconds(), abs=0.05
    )
    line = search_line(found)[0]
    assert "3/8 plans trained, 1 training" in line

    # Its process gone, as after a kill: a process of this host that has exited.
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    storage = study._storage  # noqa: SLF001
    storage.set_trial_user_attr(
        running[0]._trial_id, "worker", f"{socket.gethostname()}:{dead.pid}"
    )  # noqa: SLF001
    assert search_status(storage, "tiny").training[0]["alive"] is False
