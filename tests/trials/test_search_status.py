"""`kablate status` on a [search] sweep: the search's counts, front and hypervolume, checked
against Optuna's own view of the same study (its states, `Study.best_trials`, and
`optuna._hypervolume.compute_hypervolume`)."""

from __future__ import annotations

import numpy as np
import optuna
import pytest
from optuna._hypervolume import compute_hypervolume
from optuna.trial import TrialState

from kablate.trials.search import search_front, search_study
from kablate.trials.search_status import search_line, search_status
from tests.trials.search_workers import CHOICES, accuracy_of, screen


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
