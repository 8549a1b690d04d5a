"""`kablate status`: counts, per-variant progress, throughput and ETA from the study."""

from __future__ import annotations

from datetime import datetime, timedelta

from optuna.trial import TrialState, create_trial

from kablate.trials.status import format_status, summarize

NOW = datetime(2026, 1, 1, 12, 0, 0)


def trial(job: str, state: TrialState, start_min: float, end_min: float | None = None):
    """A trial started (and finished) so many minutes from NOW."""
    values = [0.9, 1.0] if state == TrialState.COMPLETE else None
    variant, seed = job.rsplit("-s", 1)
    attrs = {"job": job, "variant": variant, "seed": int(seed)}
    t = create_trial(state=state, values=values, user_attrs=attrs)
    t.datetime_start = NOW + timedelta(minutes=start_min)
    t.datetime_complete = NOW + timedelta(minutes=end_min) if end_min is not None else None
    return t


def row(variant, seed, status):
    return {"variant": variant, "seed": seed, "status": status, "worker": None}


def test_throughput_and_eta_come_from_running_workers_and_recent_trial_times():
    rows = [
        row("a", 0, "done"),
        row("b", 0, "done"),
        row("a", 1, "running"),
        row("b", 1, "running"),
        row("a", 2, "waiting"),
        row("b", 2, "missing"),
        row("c", 0, "diverged"),
        row("c", 1, "failed"),
    ]
    trials = [
        trial("a-s0", TrialState.COMPLETE, -30, -20),  # 10 min, long ago (an earlier night)
        trial("b-s0", TrialState.COMPLETE, -8, -2),  # 6 min
        trial("a-s1", TrialState.RUNNING, -2),
        trial("b-s1", TrialState.RUNNING, -1),
    ]
    status = summarize("demo", rows, trials, NOW, {"workers": 2, "threads": 1})
    assert status.counts == {"done": 2, "running": 2, "waiting": 2, "failed": 1, "diverged": 1}
    assert status.mean_trial_seconds == 480  # (600 + 360) / 2
    assert status.throughput_per_hour == 2 / 480 * 3600  # two workers, one trial each
    assert status.eta_seconds == 4 * 480 / 2  # 2 running + 2 waiting, two at a time
    by_name = {v["variant"]: v for v in status.variants}
    assert by_name["a"]["done"] == 1 and by_name["a"]["running"] == 1
    assert by_name["b"]["waiting"] == 1  # not enqueued yet counts as waiting
    text = format_status(status)
    assert "2/8 done, 2 running, 2 waiting, 1 failed, 1 diverged" in text
    assert "ETA 16m00s" in text
    assert "  running a seed 1 on ? for 2m00s" in text  # the variant's name, not its job key


def test_a_stopped_sweep_has_no_eta_and_says_how_to_continue():
    rows = [row("a", 0, "done"), row("a", 1, "waiting")]
    trials = [trial("a-s0", TrialState.COMPLETE, -10, -5)]
    status = summarize("demo", rows, trials, NOW, {})
    assert status.eta_seconds is None and status.throughput_per_hour == 0
    assert "no trial is running" in format_status(status)
    assert summarize("demo", rows[:1], trials, NOW, {}).finished


def test_a_finished_sweep_reports_its_throughput_over_the_time_trials_ran():
    rows = [row("a", 0, "done"), row("b", 0, "done"), row("a", 1, "diverged")]
    trials = [
        trial("a-s0", TrialState.COMPLETE, -300, -290),  # an earlier night
        trial("b-s0", TrialState.COMPLETE, -295, -285),  # overlaps it: 15 min together
        trial("a-s1", TrialState.FAIL, -10, -5),  # diverged, tonight: 5 min
    ]
    trials[2].user_attrs["outcome"] = "diverged"
    status = summarize("demo", rows, trials, NOW, {})
    assert status.finished and status.eta_seconds == 0
    assert status.throughput_per_hour == 3 / 20 * 60  # 3 trials in 20 busy minutes
    text = format_status(status)
    assert "every trial has finished; throughput 9.0 trials/h over the time trials were" in text
