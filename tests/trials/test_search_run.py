"""`kablate run` on a [search] sweep, end to end on digits: NSGA-II trains the budget with the
first seed, the front it found and the baseline are trained with every seed, the card tells
the search, and the same command again trains nothing."""

from __future__ import annotations

import contextlib
import csv
import json
import os
import re
import signal
import socket
import time
from pathlib import Path

import optuna
import pytest
from optuna.trial import TrialState

from kablate.analysis.hypervolume import hypervolume, reference_point
from kablate.results.paths import CARD_FILE, JOURNAL, REPORT_DIR, SEARCH_FILE, TRIALS_FILE
from kablate.trials.results import open_results
from kablate.trials.search import FILTERED, INTERRUPTED, REPEAT
from kablate.trials.search_claim import CLAIMED
from kablate.trials.search_run import search_study_name
from kablate.trials.store import open_storage
from tests.conftest import kablate, search_sweep
from tests.trials import runs


def run(sweep: Path, results: Path, *extra: str):
    return kablate("run", str(sweep), "--results", str(results), *extra, cwd=sweep.parent)


def searched_trials(results: Path) -> list:
    """The search study's trials, read with Optuna itself."""
    storage = open_storage(results / "tiny", None, read_only=True)
    return optuna.load_study(study_name=search_study_name("tiny"), storage=storage).trials


def test_a_search_sweep_trains_its_finalists_with_every_seed_and_resumes(tmp_path):
    sweep = search_sweep(tmp_path)  # 2 × 3 × 2 = 12 plans, budget 3
    sweep.write_text(sweep.read_text().replace("train_size = 200", "train_size = 600"))
    (tmp_path / "configs" / "tiny-recipe.toml").write_text("epochs = 1\nbatch_size = 32\n")
    results = tmp_path / "results"
    out = run(sweep, results, "--workers", "2")
    assert out.returncode == 0, out.stderr[-3000:]

    trials = searched_trials(results)
    complete = [t for t in trials if t.state == TrialState.COMPLETE]
    assert len(complete) == 3  # the budget, trained with seed 0
    record = json.loads((results / "tiny" / SEARCH_FILE).read_text())
    # The front, as Optuna's own Pareto front of the study (`Study.best_trials`), plus the
    # baseline (all-3×3 here) are the finalists.
    study = optuna.load_study(
        study_name=search_study_name("tiny"), storage=open_storage(results / "tiny", None, True)
    )
    front = {json.dumps(t.params, sort_keys=True) for t in study.best_trials}
    finalists = {json.dumps(f["plan"], sort_keys=True) for f in record["finalists"]}
    baseline = json.dumps({"stage1": "3", "stage2": "3", "stem": "3"})
    assert finalists == front | {baseline}

    with (results / "tiny" / TRIALS_FILE).open() as f:
        rows = list(csv.DictReader(f))
    trained = {(r["variant"], int(r["seed"])) for r in rows if r["status"] == "done"}
    names = {f["name"] for f in record["finalists"]}
    assert trained == {(name, seed) for name in names for seed in (0, 1)}
    # Readers of the folder (effective receptive fields, export) rebuild the finalists.
    assert {plan.name for plan in open_results(results / "tiny").sweep().plans} == names

    card = (results / "tiny" / REPORT_DIR / CARD_FILE).read_text()
    assert "#### Search over the plan space" in card and "Deb, Pratap, Agarwal" in card
    assert "trained 3 of the 12 plans of the space (25.0%" in card
    found = re.search(r"Hypervolume of the trained plans [^:]*: ([\d.e+]+) ", card)
    accuracy = [t.values[0] for t in complete]
    cost = [t.values[1] for t in complete]
    expected = hypervolume(accuracy, cost, reference_point(cost))
    assert found and abs(float(found.group(1)) - expected) <= 1e-5 * max(expected, 1e-9), (
        found,
        expected,
    )

    again = run(sweep, results, "--workers", "2", "--no-report")
    assert again.returncode == 0, again.stderr[-3000:]
    assert f"nothing new to train: all {2 * len(names)} trials were already" in again.stdout
    assert len(searched_trials(results)) == len(trials)  # the search proposed nothing new
    status = kablate("status", str(results / "tiny"), cwd=tmp_path)
    assert status.returncode == 0, status.stderr[-3000:]


def test_dry_run_estimates_a_search_sweep_and_budget_refuses_it(tmp_path):
    sweep = search_sweep(tmp_path)  # budget 3, 2 seeds, no [[plan]]
    out = run(sweep, tmp_path / "results", "--dry-run", "--workers", "2")
    assert out.returncode == 0, out.stderr[-3000:]
    # the search: 3 plans; the finalists: at most 3 on the front + the baseline, × 2 seeds
    # the space's one uniform plan (all 3×3) is its one start plan
    assert "search: 3 plans at" in out.stdout and "(timed on the 1 start plan(s))" in out.stdout
    assert "on 2 worker(s)" in out.stdout
    assert "finalists: at most 4 plans" in out.stdout and "× 2 seeds = 8 trials" in out.stdout
    assert not (tmp_path / "results" / "tiny" / SEARCH_FILE).exists()  # nothing trained

    out = run(sweep, tmp_path / "results", "--budget", "1h")
    assert out.returncode == 2 and "`search`" in out.stderr, out.stderr[-2000:]
    assert "--dry-run" in out.stderr and "Traceback" not in out.stderr
    assert not (tmp_path / "results" / "tiny" / SEARCH_FILE).exists()


@pytest.mark.parametrize("workers", [1, 2])
def test_a_search_killed_mid_training_resumes_with_the_same_command(tmp_path, workers):
    """SIGKILL to the whole run (the runner and, with 2 workers, the worker process searching
    beside it) while a plan trains after the first finished; the same command keeps the
    trained plans, proposes again up to the budget, then trains the finalists."""
    sweep = search_sweep(tmp_path)
    sweep.write_text(sweep.read_text().replace("train_size = 200", "train_size = 600"))
    (tmp_path / "configs" / "tiny-recipe.toml").write_text("epochs = 8\nbatch_size = 64\n")
    results = tmp_path / "results"
    args = ["run", str(sweep), "--workers", str(workers), "--results", str(results)]
    args.append("--no-report")
    proc = runs.kablate(*args, storage=None, cwd=tmp_path, wait=False)
    journal = results / "tiny" / JOURNAL
    deadline, study = time.time() + 120, None
    while time.time() < deadline:
        assert proc.poll() is None, proc.communicate()
        if study is None and journal.is_file():
            with contextlib.suppress(KeyError):
                study = optuna.load_study(
                    study_name=search_study_name("tiny"),
                    storage=open_storage(results / "tiny", None, read_only=True),
                )
        trials = study.get_trials(deepcopy=False) if study else []
        training = [t.state == TrialState.RUNNING and t.user_attrs.get("outcome") for t in trials]
        if any(t.state == TrialState.COMPLETE for t in trials) and CLAIMED in training:
            break
        time.sleep(0.02)
    else:
        raise AssertionError("the search did not start its second plan in time")
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    before = {t.number: t.values for t in searched_trials(results) if t.values}
    # Killed in its search phase: no sweep.json yet, and status shows the search as it stopped.
    status = kablate("status", str(results / "tiny"), "--format", "json", cwd=tmp_path)
    assert status.returncode == 0, status.stderr[-3000:]
    shown = json.loads(status.stdout)
    assert (shown["phase"], shown["finalists"], shown["n_trials"]) == ("search", None, None)
    assert shown["search"]["n_trained"] == len(before) >= 1
    training = shown["search"]["training"]  # one plan at most per killed process, none alive
    assert 1 <= len(training) <= workers and not any(e["alive"] for e in training)
    if workers == 1:  # the run's own process trained it
        assert training[0]["worker"] == f"{socket.gethostname()}:{proc.pid}"

    again = runs.kablate(*args, storage=None, cwd=tmp_path)
    assert again.returncode == 0, again.stderr[-3000:]
    trials = searched_trials(results)
    assert {t.number: t.values for t in trials if t.number in before} == before  # kept
    assert sum(t.state == TrialState.COMPLETE for t in trials) == 3  # the budget, no more
    # A FAIL is a repeated or filtered proposal, or a plan cut by the kill (one per process).
    cut = [t for t in trials if t.state == TrialState.FAIL and t.user_attrs["outcome"] not in
           (REPEAT, FILTERED)]  # fmt: skip
    assert 1 <= len(cut) <= workers
    assert {t.user_attrs["outcome"] for t in cut} == {INTERRUPTED}
    record = json.loads((results / "tiny" / SEARCH_FILE).read_text())
    with (results / "tiny" / TRIALS_FILE).open() as f:
        done = {(r["variant"], r["seed"]) for r in csv.DictReader(f) if r["status"] == "done"}
    assert done == {(f["name"], s) for f in record["finalists"] for s in ("0", "1")}
    shown = json.loads(kablate("status", str(results / "tiny"), "--format", "json").stdout)
    assert shown["phase"] == "trials" and shown["n_trials"] == len(done)
    assert shown["finalists"] == [f["name"] for f in record["finalists"]]
