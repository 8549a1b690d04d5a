"""Opening a results folder with the study it ran on: the folder's own journal by default, the
storage its sweep.json recorded, or the one $KABLATE_STORAGE names; its rows are read from
that study."""

from __future__ import annotations

import json

from optuna.trial import TrialState, create_trial

from kablate.results.paths import PLAN_FILE, SWEEP_FILE
from kablate.trials.jobs import Job
from kablate.trials.results import open_results
from kablate.trials.store import STORAGE_ENV, open_study

PLAN = {
    "seeds": [0],
    "baseline": "v0",
    "variants": [{"id": "v0", "name": "all-3", "params": 1, "macs": 2, "rf": 3}],
}


def folder_with_a_done_trial(path, url=None, recorded=None):
    path.mkdir(exist_ok=True)
    meta = {"name": "tiny", **({"storage_url": recorded} if recorded else {})}
    (path / SWEEP_FILE).write_text(json.dumps(meta), encoding="utf-8")
    (path / PLAN_FILE).write_text(json.dumps(PLAN), encoding="utf-8")
    study = open_study("tiny", path, url, create=True)
    attrs = {**Job("v0", "all-3", 0).attrs(), "val_acc": 0.75}
    trial = create_trial(state=TrialState.COMPLETE, values=[0.75, 2.0], user_attrs=attrs)
    study.add_trial(trial)
    return path


def test_the_folders_own_journal_is_read_by_default(tmp_path, monkeypatch):
    monkeypatch.delenv(STORAGE_ENV, raising=False)
    folder = open_results(folder_with_a_done_trial(tmp_path / "results"))
    rows, _ = folder.rows()
    assert [(r["variant"], r["status"], r["val_acc"]) for r in rows] == [("all-3", "done", 0.75)]
    assert folder.name == "tiny" and folder.race() is None and folder.halving() is None


def test_the_recorded_storage_or_the_environments_is_opened(tmp_path, monkeypatch):
    monkeypatch.delenv(STORAGE_ENV, raising=False)
    url = f"sqlite:///{tmp_path / 'shared.db'}"
    path = folder_with_a_done_trial(tmp_path / "recorded", url, recorded=url)
    assert open_results(path).rows()[0][0]["status"] == "done"  # not the (absent) journal
    other = folder_with_a_done_trial(tmp_path / "other", url)  # sweep.json records nothing
    monkeypatch.setenv(STORAGE_ENV, url)
    assert len(open_results(other).study.get_trials()) == 2  # both folders' trials: one study
