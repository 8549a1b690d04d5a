"""Successive halving end to end on digits (trials/halving.py): stopped trials reach
trials.csv, `status` and the card as stopped, with their last score, and are never
recommended; with two workers on the journal file."""

from __future__ import annotations

import csv
import math

import pytest
from scipy import stats

from kablate.lifecycle import STOPPED
from kablate.report import write_report
from kablate.trials import RunOptions, open_results, run_sweep
from kablate.trials.status import format_status, read_status
from tests.conftest import write_sweep
from tests.trials.test_race import RACE_SWEEP

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
