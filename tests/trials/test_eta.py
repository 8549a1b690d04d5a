"""The sweep's one ETA (trials/eta.py) on hand-worked numbers, and the bar that shows it.

The formula is kablate's own (its docstring); each expected value below is worked by hand
from it, step by step in the comments.
"""

from __future__ import annotations

import logging
from datetime import datetime, timedelta

import pytest

from kablate.trials.eta import eta_seconds, time_ratio
from kablate.trials.pool import SweepProgress

PREDICTED = {"a-s0": 10.0, "b-s0": 20.0, "c-s0": 30.0, "d-s0": 40.0}


def test_the_ratio_is_of_sums_over_predicted_trials():
    # (15 + 20) / (10 + 20) = 7/6, not the mean of the ratios (1.5 + 1.0) / 2 = 1.25;
    # "x-s0" has no prediction and is left out.
    ratio = time_ratio({"a-s0": 15.0, "b-s0": 20.0, "x-s0": 99.0}, PREDICTED)
    assert ratio == pytest.approx(7 / 6)
    assert time_ratio({}, PREDICTED) == 1.0  # nothing measured yet: the calibration as is


def test_eta_corrects_the_calibration_by_the_measured_ratio():
    # a took 15 s for 10 predicted: r = 1.5. b runs for 6 s: 1.5·20 − 6 = 24 left.
    # c and d wait: 45 and 60. (24 + 45 + 60) / 2 workers = 64.5 ≥ the longest, 60.
    eta = eta_seconds(PREDICTED, {"a-s0": 15.0}, {"a-s0"}, {"b-s0": 6.0}, n_workers=2)
    assert eta == pytest.approx(64.5)


def test_eta_before_any_trial_finished_is_the_calibration_spread_over_the_workers():
    # r = 1: (10 + 20 + 30 + 40) / 2 = 50 ≥ 40.
    assert eta_seconds(PREDICTED, {}, set(), {}, n_workers=2) == pytest.approx(50.0)


def test_eta_at_the_end_is_the_longest_trial_left_not_a_share_of_it():
    # Only d is left: 40 s on one of 2 workers, not 40 / 2 = 20.
    done = {"a-s0", "b-s0", "c-s0"}
    assert eta_seconds(PREDICTED, {}, done, {}, n_workers=2) == pytest.approx(40.0)


def test_a_trial_past_its_prediction_counts_as_nothing_left_and_old_trials_as_done():
    # b ran 50 s, past 1.0·20: 0 left. a finished in an earlier run (done, not measured).
    eta = eta_seconds(PREDICTED, {}, {"a-s0"}, {"b-s0": 50.0}, n_workers=1)
    assert eta == pytest.approx(30.0 + 40.0)
    assert eta_seconds({}, {}, set(), {}, n_workers=2) is None  # no calibration, no ETA


def test_the_bar_shows_kablates_eta_and_not_its_own(capsys):
    progress = SweepProgress(4, 0, interactive=True, predicted=PREDICTED, n_workers=2)
    now = datetime.now()
    # a took 15 s (r = 1.5); b has run 100 s, past 1.5·20 = 30: nothing left of it.
    # c and d wait: (45 + 60) / 2 = 52.5 < 60, so the ETA is 60 s = 1m00s.
    progress.measured, progress.done = {"a-s0": 15.0}, {"a-s0"}
    progress.started = {"b-s0": now - timedelta(seconds=100)}
    progress.update(1)
    progress.close()
    bar = capsys.readouterr().err.replace("\r", "\n").strip().splitlines()[-1]
    assert "1/4" in bar and "ETA 1m00s" in bar, bar
    # tqdm's own remaining time ("<00:54") and rate ("2.1s/trial") are not shown.
    assert "<" not in bar and "/trial" not in bar and "trial/s" not in bar, bar
    assert progress.line() == "progress: 1/4 trials finished, 1 running, ETA 1m00s"


def test_before_a_trial_is_claimed_the_line_says_the_workers_are_starting():
    progress = SweepProgress(4, 0, interactive=False, predicted=PREDICTED, n_workers=2)
    assert progress.line() == "progress: 0/4 trials finished; the workers are starting"
    progress.close()


def test_trials_that_will_not_run_leave_the_total_and_the_eta_and_the_log_re_plans(
    caplog, monkeypatch
):
    # d's variant was retired (or stopped by halving on another seed): a is done, b and c
    # wait. Left: 20 + 30 = 50 s on 2 workers = 25 s, less than c's 30 s: ETA 30 s = 30s.
    progress = SweepProgress(4, 1, interactive=False, predicted=PREDICTED, n_workers=2)
    progress.done = {"a-s0"}
    rows = [
        {"variant_id": v, "seed": 0, "status": status}
        for v, status in (("a", "done"), ("b", "waiting"), ("c", "waiting"), ("d", "retired"))
    ]
    # Only caplog's handler on the logger: an earlier test's run may have left its own there
    # (pool.setup_logging stops propagation, and pytest attaches its capture handlers).
    monkeypatch.setattr(logging.getLogger("kablate"), "handlers", [caplog.handler])
    monkeypatch.setattr(logging.getLogger("kablate"), "propagate", False)
    with caplog.at_level(logging.INFO, logger="kablate"):
        progress.settle(rows)
        progress.settle(rows)  # nothing changed: no second line
    progress.close()
    assert progress.total == 3 and progress.eta() == pytest.approx(30.0)
    lines = [r.getMessage() for r in caplog.records if r.getMessage().startswith("re-plan")]
    assert lines == [
        "re-plan: 2 trial(s) left to run, 1 not run (variant retired by racing or stopped by "
        "halving), ETA 30s"
    ]
