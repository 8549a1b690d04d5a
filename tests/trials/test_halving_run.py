"""Successive halving end to end on digits (trials/halving.py): stopped trials reach
trials.csv, `status` and the card as stopped, with their last score, and are never
recommended (two workers, journal file); a run whose worker is SIGKILLed resumes and decides
each job's rung once (journal file and PostgreSQL)."""

from __future__ import annotations

import csv
import math
import os
import signal

import pytest
from optuna.trial import TrialState
from scipy import stats

from kablate.lifecycle import STOPPED
from kablate.report import write_report
from kablate.trials import RunOptions, open_results, run_sweep
from kablate.trials.outcome import verdict
from kablate.trials.status import format_status, read_status
from tests.conftest import write_sweep
from tests.trials.runs import (
    JOBS,
    RACE_SWEEP,
    kablate,
    run_args,
    study_of,
    wait_for_running_trial,
)

STOPPED_STATE = TrialState.PRUNED  # how storage holds a stopped trial (lifecycle.py)

# The racing sweep's data, network, recipe (4 epochs) and plans, with the blind plan, which stays
# near chance (tests/trials/test_race.py), and one more plan; compared after epochs 1 and 2.
HALVING_SWEEP = (
    RACE_SWEEP.format(name="halved", racing="off", seeds="[0]")
    + """
[[plan]]
name = "body-5"
body = "5"

[halving]
enabled = true
first_epoch = 1
factor = 2
"""
)


def rows(path):
    with path.open() as fh:
        return list(csv.DictReader(fh))


@pytest.mark.slow
def test_stopped_trials_are_listed_as_stopped_and_never_recommended(tmp_path):
    sweep = write_sweep(tmp_path, HALVING_SWEEP, "halved")
    opts = RunOptions(results_root=tmp_path / "results", workers=2, show_progress=False)
    summary = run_sweep(sweep, opts)
    n_stopped = summary.counts.get(STOPPED, 0)
    # Four trials reach rung 1 one after another: only a run whose scores rose in the order
    # the trials arrived would stop none.
    assert n_stopped >= 1 and summary.counts.get("done", 0) == 4 - n_stopped
    folder = open_results(summary.results_dir)
    card = write_report(folder, with_erf=False).read_text()
    trials = rows(summary.results_dir / "trials.csv")
    curves = rows(summary.results_dir / "curves.csv")
    stopped = [r for r in trials if r["status"] == STOPPED]
    assert len(stopped) == n_stopped
    for r in stopped:
        # Its score is its last validation accuracy, after a rung's epoch; no test score.
        assert r["score_epoch"] in ("1", "2") and math.isnan(float(r["test_acc"] or "nan"))
        mine = [c for c in curves if c["variant"] == r["variant"]]
        assert mine[-1]["epoch"] == r["score_epoch"]
        assert float(r["val_acc"]) == pytest.approx(float(mine[-1]["val_acc"]))
    variants = {r["variant"]: r for r in rows(summary.results_dir / "variants.csv")}
    for r in stopped:
        v = variants[r["variant"]]
        assert v["recommended"] == "False" and math.isnan(float(v["val_acc_mean"] or "nan"))
        assert v["n_stopped"] == "1" and v["stopped_epoch"] == r["score_epoch"]
    assert sum(v["recommended"] == "True" for v in variants.values()) == 1
    # status: the count, and one '/' per stopped trial.
    text = format_status(read_status(folder))
    assert f"{n_stopped} stopped early (successive halving)" in text
    for r in stopped:
        (line,) = [x for x in text.splitlines() if x.split()[:2] == [r["variant"], "[/]"]]
        assert line.endswith("stopped early by successive halving: not compared")
    # The card: the section, each stopped trial's row, the bias, and the rank agreement.
    assert "#### Successive halving inside trials" in card and "Known bias" in card
    for r in stopped:
        assert f"stopped early by epoch {r['score_epoch']}" in card
    done = [r for r in trials if r["status"] == "done"]
    assert f"{len(stopped)} trial(s) stopped early; {len(done)} ran to the end." in card
    if len(done) >= 3:  # the Spearman ρ of the card is scipy's over the done trials
        early = {c["variant"]: float(c["val_acc"]) for c in curves if c["epoch"] == "1"}
        rho = stats.spearmanr(
            [early[r["variant"]] for r in done], [float(r["val_acc"]) for r in done]
        )[0]
        assert f"| 1 | {len(done)} | {rho:.2f} |" in card


@pytest.mark.slow
def test_a_variant_stopped_on_a_seed_gets_no_more_seeds(tmp_path):
    # One worker: seed 0's trials, then seed 1's, so every stop on seed 0 comes before the
    # variant's seed 1 could be claimed.
    sweep = write_sweep(tmp_path, HALVING_SWEEP.replace("seeds = [0]", "seeds = [0, 1]"), "halved")
    opts = RunOptions(results_root=tmp_path / "results", workers=1, show_progress=False)
    summary = run_sweep(sweep, opts)
    trials = rows(summary.results_dir / "trials.csv")
    by = {(r["variant"], r["seed"]): r for r in trials}
    halted = sorted(r["variant"] for r in trials if r["seed"] == "0" and r["status"] == STOPPED)
    assert halted, "no variant was stopped on seed 0: the sweep no longer exercises halving"
    # The baseline (all-3) is never stopped.
    assert by["all-3", "0"]["status"] == by["all-3", "1"]["status"] == "done"
    not_run = sorted(r["variant"] for r in trials if r["status"] == "retired")
    assert not_run == halted and summary.counts["retired"] == len(halted)
    for name in halted:
        r = by[name, "1"]
        assert (r["retired_why"], r["retired_after"], r["val_acc"]) == ("stopped", "0", "")
    folder = open_results(summary.results_dir)
    text = format_status(read_status(folder))
    assert f"{len(halted)} not run (variant stopped by halving)" in text
    for name in halted:
        (line,) = [x for x in text.splitlines() if x.split()[:1] == [name]]
        assert line.endswith("not run: 1 seed(s), variant stopped by halving after seed 0")
    card = write_report(folder, with_erf=False).read_text()
    assert f"{len(halted)} trial(s) not run: their variant was stopped on another seed." in card
    for name in halted:
        assert f"| {name} | 1 | 0 |" in card
    # The estimate says it is an upper bound; the log re-plans after seed 0's round.
    assert "an upper bound: halving may stop trials early" in summary.estimate
    log = (summary.results_dir / "run.log").read_text()
    assert (
        f"re-plan after seed 0: {4 - len(halted)} trial(s) left to run, {len(halted)} not run"
        in log
    )


@pytest.mark.slow
def test_a_race_decides_its_rounds_without_the_variants_halving_stopped(tmp_path):
    # Racing waits for every variant in the race to finish a seed before it decides the round
    # and enqueues the next seed; a variant stopped by halving is out of the race, else the
    # round after its stop would never be decided and seed 1 never queued.
    text = HALVING_SWEEP.replace("seeds = [0]", "seeds = [0, 1]").replace(
        'racing = "off"', 'racing = "on"'
    )
    sweep = write_sweep(tmp_path, text, "halved")
    opts = RunOptions(results_root=tmp_path / "results", workers=1, show_progress=False)
    summary = run_sweep(sweep, opts)
    assert verdict(summary) == (0, "")
    trials = rows(summary.results_dir / "trials.csv")
    assert not [r for r in trials if r["status"] in ("waiting", "missing", "failed")]
    halted = {r["variant"] for r in trials if r["seed"] == "0" and r["status"] == STOPPED}
    assert halted, "no variant was stopped on seed 0: the sweep no longer exercises halving"
    for r in trials:
        if r["variant"] in halted and r["seed"] == "1":
            assert (r["status"], r["retired_why"]) == ("retired", "stopped")
    race = open_results(summary.results_dir).race()
    assert set(race["rounds"]) == {0, 1}  # both rounds decided
    halted_ids = {r["variant_id"] for r in trials if r["variant"] in halted}
    assert not halted_ids & {v for r in race["rounds"].values() for v in r["compared"]}


@pytest.fixture
def long_halving_sweep(long_sweep):
    """The resume tests' long sweep (2 plans × 2 seeds, 40 epochs), compared after epochs 10
    and 20."""
    text = long_sweep.read_text() + "\n[halving]\nenabled = true\nfirst_epoch = 10\nfactor = 2\n"
    long_sweep.write_text(text)
    return long_sweep


@pytest.mark.slow
def test_a_sigkilled_halving_run_resumes_deciding_each_rung_once(
    long_halving_sweep, tmp_path, storage
):
    results = tmp_path / "results"
    proc = kablate(
        *run_args(long_halving_sweep, results), storage=storage, cwd=tmp_path, wait=False
    )
    key, pid = wait_for_kept_trial(results, storage, proc)
    os.kill(pid, signal.SIGKILL)
    out, err = proc.communicate(timeout=240)
    assert proc.returncode == 0, err
    trials = study_of(results, storage).get_trials()
    assert not [t for t in trials if t.state in (TrialState.RUNNING, TrialState.WAITING)]
    ended = [t.user_attrs["job"] for t in trials if t.state in (TrialState.COMPLETE, STOPPED_STATE)]
    # Each job done or stopped, once; or withdrawn, as its variant was stopped on a seed.
    withdrawn = {t.user_attrs["job"] for t in trials if t.user_attrs.get("outcome") == "retired"}
    assert len(ended) == len(set(ended)) == JOBS - len(withdrawn - set(ended))
    stopped_variants = {t.user_attrs["variant_id"] for t in trials if t.state == STOPPED_STATE}
    assert {t.user_attrs["variant_id"] for t in trials if t.user_attrs["job"] in withdrawn} <= (
        stopped_variants
    )
    killed = [t for t in trials if t.user_attrs.get("job") == key]
    assert [t for t in killed if t.state == TrialState.FAIL]  # lost, then resumed
    # The killed trial went on at the first rung; its resumed trial, from a later checkpoint,
    # does not decide that rung again.
    assert killed[0].user_attrs["halving-rung-0"]["kept"]
    assert "halving-rung-0" not in killed[-1].user_attrs
    for job in set(ended):
        for rung in (0, 1):  # one decision per job and rung, whoever trained it
            mine = [t for t in trials if t.user_attrs.get("job") == job]
            assert sum(f"halving-rung-{rung}" in t.user_attrs for t in mine) <= 1
    for t in trials:
        if t.state == STOPPED_STATE:  # stopped at a rung, after its decision said so
            decisions = [t.user_attrs.get(f"halving-rung-{k}") for k in (0, 1)]
            assert any(d and not d["kept"] for d in decisions + earlier(trials, t))
    again = kablate(*run_args(long_halving_sweep, results), storage=storage, cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    assert "nothing new to train" in again.stdout


def wait_for_kept_trial(results, storage, proc) -> tuple[str, int]:
    """(job key, worker pid) of a running trial that went on at the first rung (epoch 10)."""

    def ready(t) -> bool:
        return bool((t.user_attrs.get("halving-rung-0") or {}).get("kept"))

    return wait_for_running_trial(results, storage, proc, ready, "went on at the first rung")


def earlier(trials, trial) -> list:
    """The rung decisions that the job's other trials recorded."""
    job = trial.user_attrs["job"]
    return [
        t.user_attrs.get(f"halving-rung-{k}")
        for t in trials
        if t.user_attrs.get("job") == job and t.number != trial.number
        for k in (0, 1)
    ]
