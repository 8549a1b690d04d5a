"""`kablate status`: counts, per-variant progress, throughput and ETA from the study; a
[search] sweep's search while it has no trials yet."""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
from dataclasses import asdict, fields
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from optuna._hypervolume import compute_hypervolume
from optuna.trial import TrialState, create_trial

from kablate.analysis.standing import stand
from kablate.analysis.summary import analyze
from kablate.errors import UsageError
from kablate.results.paths import SEARCH_FILE, SWEEP_FILE
from kablate.spec.schema import PickSpec
from kablate.trials import RunOptions, open_results, run_sweep
from kablate.trials.status import SweepStatus, folder_status, format_status, summarize
from tests.conftest import TINY_SWEEP, write_sweep
from tests.trials.search_workers import CHOICES, stopped_search

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
    assert status.counts == {
        "done": 2,
        "running": 2,
        "waiting": 2,
        "failed": 1,
        "diverged": 1,
        "retired": 0,
        "stopped": 0,
    }
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


def test_trials_stopped_by_successive_halving_are_counted_and_drawn_apart():
    rows = [row("a", 0, "done"), row("b", 0, "stopped"), row("b", 1, "done")]
    status = summarize("demo", rows, [], NOW, {"workers": 1, "threads": 1})
    assert status.counts["stopped"] == 1 and status.finished
    text = format_status(status)
    assert "1/3 done" not in text and "2/3 done" in text
    assert "1 stopped early (successive halving)" in text
    assert "  b  [#/]  1/2  stopped early by successive halving: not compared" in text


def test_a_variant_stopped_by_halving_counts_its_unrun_seeds_apart_and_its_stop_not_in_the_eta():
    not_run = {"retired_why": "stopped", "retired_after": 0}
    rows = [
        row("a", 0, "done"),
        row("b", 0, "stopped"),
        row("a", 1, "running"),
        dict(row("b", 1, "retired"), **not_run),
        row("a", 2, "waiting"),
        dict(row("b", 2, "retired"), **not_run),
    ]
    stopped = trial("b-s0", TrialState.PRUNED, -20, -19)  # 1 min: stopped at its first rung
    stopped.user_attrs["outcome"] = "stopped"
    trials = [
        trial("a-s0", TrialState.COMPLETE, -30, -20),
        stopped,
        trial("a-s1", TrialState.RUNNING, -2),
    ]
    status = summarize("demo", rows, trials, NOW, {"workers": 1, "threads": 1})
    # A trial takes a's 10 min (the stop's 1 min is not a trial's time): 2 left on 1 worker.
    assert status.mean_trial_seconds == 600 and status.eta_seconds == 2 * 600
    text = format_status(status)
    assert "1 stopped early (successive halving), 2 not run (variant stopped by halving)" in text
    assert "not run (variant retired by racing)" not in text
    (line,) = [x for x in text.splitlines() if x.startswith("  b  ")]
    assert line.endswith("; not run: 2 seed(s), variant stopped by halving after seed 0")


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


# A third plan cheaper than the baseline, and a wide margin, so that the rule has a cheaper plan
# to weigh; the sweep is cut after its first seed.
PARTIAL_SWEEP = (
    # racing off: a --budget run would otherwise race, and the wide margin retires the
    # costlier plans for futility after seed 0, so the second seed would not all wait
    TINY_SWEEP.replace("seeds = [0, 1]", 'seeds = [0]\nracing = "off"')
    + '\n[[plan]]\nname = "stem-1"\nstem = "1"\n\n[pick]\nmargin = 20.0\n'
)


@pytest.fixture(scope="module")
def partial_sweep(tmp_path_factory) -> Path:
    """A sweep whose first seed has finished and whose second waits: run with one seed, then
    with two under a budget too short for any trial (as `test_budget` does)."""
    root = tmp_path_factory.mktemp("partial")
    path = write_sweep(root, PARTIAL_SWEEP)
    opts = RunOptions(results_root=root / "results", workers=1, show_progress=False)
    run_sweep(path, opts)
    path.write_text(PARTIAL_SWEEP.replace("seeds = [0]\n", "seeds = [0, 1]\n"))
    opts.budget_seconds, opts.echo = 0.001, lambda text: None
    summary = run_sweep(path, opts)
    assert summary.counts == {"done": 3, "waiting": 3}
    return summary.results_dir


def reference(folder: Path, rows: list[dict] | None = None):
    """`analyze` on the folder's rows (or ``rows``), as the report runs it, with the sweep's
    [pick] written out here rather than read back through `pick_settings`."""
    results = open_results(folder)
    found, curves = results.rows()
    data = results.data()
    pick = PickSpec(margin=20.0)
    return analyze(rows or found, curves, results.plan, [], data, pick)


def status_json(folder: Path, storage: str | None = None) -> dict:
    """`kablate status FOLDER --format json [--storage URL]`, run as a user runs it, parsed."""
    extra = ["--storage", storage] if storage else []
    out = subprocess.run(
        [sys.executable, "-m", "kablate", "status", str(folder), "--format", "json", *extra],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout)


@pytest.mark.slow
def test_status_of_a_partial_sweep_gives_the_analysis_leader_and_accuracies(partial_sweep):
    standing = status_json(partial_sweep)["standing"]
    # The reference is the analysis the report runs (kablate.analysis.summary.analyze: per-image
    # evidence, two-level bootstrap, non-inferiority pick), on the same rows.
    analysis = reference(partial_sweep)
    assert analysis.decision is not None and analysis.n_missing == 3
    assert standing["leader"] == analysis.recommended
    assert standing["provisional"] is True and standing["n_missing"] == 3
    assert standing["stability"] == pytest.approx(analysis.decision.stability)
    assert (standing["rule"], standing["margin_pp"], standing["baseline"]) == (
        "margin",
        20.0,
        "all-3",
    )
    table = analysis.variants.set_index("variant")
    assert [v["variant"] for v in standing["variants"]] == list(table.index)
    for entry in standing["variants"]:
        row = table.loc[entry["variant"]]
        assert entry["n_seeds"] == row["n_seeds"] == 1 and entry["n_planned"] == 2
        for col in ("val_acc_mean", "val_acc_ci_low", "val_acc_ci_high"):
            assert entry[col] == pytest.approx(row[col], abs=1e-12), (entry["variant"], col)
        # ... and the mean is the trial's own scored accuracy (one seed: nothing to average).
        trial = analysis.trials.query("variant == @entry['variant'] and status == 'done'")
        assert entry["val_acc_mean"] == pytest.approx(float(trial["val_acc"].iloc[0]))
        assert entry["val_acc_ci_low"] <= entry["val_acc_mean"] <= entry["val_acc_ci_high"]

    text = subprocess.run(
        [sys.executable, "-m", "kablate", "status", str(partial_sweep)],
        capture_output=True,
        text=True,
        timeout=300,
    ).stdout
    assert f"provisional leader (3 trial(s) have no result yet): {analysis.recommended}," in text
    for entry in standing["variants"]:
        mean, low, high = (
            100 * entry[c] for c in ("val_acc_mean", "val_acc_ci_low", "val_acc_ci_high")
        )
        line = next(x for x in text.splitlines() if x.startswith(f"  {entry['variant']} "))
        assert line.endswith(f"[#.]  1/2  val acc {mean:.2f}% [{low:.2f}, {high:.2f}] on 1 seed(s)")


@pytest.mark.slow
def test_without_a_finished_baseline_there_is_no_leader_and_status_says_why(partial_sweep):
    folder = open_results(partial_sweep)
    rows, curves = folder.rows()
    for row in rows:  # as if the baseline's trial were still running
        if row["variant"] == "all-3":
            row["status"] = "running"
    standing = stand(rows, curves, folder.plan, [], folder.data(), PickSpec(margin=20.0))
    analysis = reference(partial_sweep, rows)
    assert analysis.decision is None and standing.leader is None
    assert standing.note == (
        "no leader yet: the baseline all-3 has no finished trial, and the margin rule compares "
        "every plan with it"
    )
    # The other variants' accuracies are still shown, as the analysis gives them.
    table = analysis.variants.set_index("variant")
    shown = {v["variant"]: v["val_acc_mean"] for v in standing.variants}
    assert shown["all-3"] is None
    assert shown["stem-5"] == pytest.approx(table.loc["stem-5", "val_acc_mean"])
    status = summarize("tiny", rows, [], NOW, {})
    status.standing = asdict(standing)
    text = format_status(status)
    assert text.endswith(standing.note) and "leader:" not in text


def test_a_search_sweep_in_its_search_phase_shows_the_search_and_no_trials(tmp_path, storage):
    """Before a [search] sweep's finalists are chosen there is no sweep.json: status reads the
    search study; its figures are checked against Optuna's view of the same study."""
    folder = tmp_path / "tiny"
    folder.mkdir()
    study = stopped_search(folder, "tiny", budget=8, n_trained=3, url=storage)
    assert not (folder / SWEEP_FILE).exists()
    shown = status_json(folder, storage)
    assert set(shown) == {f.name for f in fields(SweepStatus)}  # the keys of any status
    assert (shown["phase"], shown["sweep"], shown["finalists"]) == ("search", "tiny", None)
    for key in ("n_trials", "counts", "throughput_per_hour", "eta_seconds", "standing"):
        assert shown[key] is None, key
    assert shown["variants"] == shown["running"] == [] and shown["finished"] is False
    search = shown["search"]
    complete = study.get_trials(states=(TrialState.COMPLETE,))
    (running,) = study.get_trials(states=(TrialState.RUNNING,))
    assert (search["budget"], search["n_trained"], search["n_training"]) == (8, len(complete), 1)
    assert search["n_front"] == len({tuple(t.values) for t in study.best_trials})
    losses = np.array([[-t.values[0], t.values[1]] for t in complete])
    reference = np.array([0.0, max(t.values[1] for t in complete)])
    assert search["hypervolume"] == pytest.approx(compute_hypervolume(losses, reference))
    plan = "+".join(f"{g}={running.params[g]}" for g in CHOICES)
    worker = f"{socket.gethostname()}:{os.getpid()}"
    assert [(e["plan"], e["worker"], e["alive"]) for e in search["training"]] == [
        (plan, worker, True)
    ]

    text = format_status(folder_status(folder, storage))
    assert "sweep tiny: searching; the finalists" in text and "are not chosen yet" in text
    assert f"3/8 plans trained, 1 training, {search['n_proposed']} proposed" in text
    assert f"  training {plan} on {worker} for " in text
    assert "no plan is training" not in text

    # Killed: the plan's process is gone, so nothing trains until the run is rerun.
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    backend = study._storage  # noqa: SLF001
    gone = f"{socket.gethostname()}:{dead.pid}"
    backend.set_trial_user_attr(running._trial_id, "worker", gone)  # noqa: SLF001
    text = format_status(folder_status(folder, storage))
    assert f"on {gone} for " in text and "(its process has ended" in text
    assert "3/8 plans trained, 1 training (1 of them by a process that has ended), " in text
    assert "no plan is training: rerun the sweep's `kablate run` command to continue" in text

    # The search has ended (search.json) but the finalists are not recorded yet.
    (folder / SEARCH_FILE).write_text(json.dumps({"finalists": [{"name": "a"}, {"name": "b"}]}))
    status = folder_status(folder, storage)
    assert (status.phase, status.finalists) == ("search", ["a", "b"])
    assert "the search has ended with 2 finalist(s)" in format_status(status)


def test_a_folder_without_records_or_a_search_is_refused(tmp_path):
    with pytest.raises(UsageError, match=r"sweep\.json is missing.*--storage or \$KABLATE_STORAGE"):
        folder_status(tmp_path)  # no journal: a search could only be on a server storage
    stopped_search(tmp_path, "other", budget=8, n_trained=1)  # a journal without tiny.search
    with pytest.raises(UsageError, match=r"sweep\.json is missing"):
        folder_status(tmp_path)


def test_a_running_trial_whose_process_has_ended_is_named_and_left_out_of_the_eta():
    # Liveness by the operating system's own pid check: a process that has exited is gone,
    # this test's own process is alive.
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    host = socket.gethostname()
    rows = [row("a", 0, "done"), row("a", 1, "running"), row("b", 1, "running")]
    rows += [row("a", 2, "waiting")]
    trials = [trial("a-s0", TrialState.COMPLETE, -10, -5)]
    for job, pid in (("a-s1", os.getpid()), ("b-s1", dead.pid)):
        running = trial(job, TrialState.RUNNING, -2)
        running.user_attrs["worker"] = f"{host}:{pid}"
        trials.append(running)
    status = summarize("demo", rows, trials, NOW, {"workers": 2, "threads": 1})
    assert [(e["job"], e["alive"]) for e in status.running] == [("a-s1", True), ("b-s1", False)]
    # 3 trials left (2 running, 1 waiting) at 5 min each, on the one worker still alive.
    assert status.eta_seconds == 3 * 300 / 1 and status.throughput_per_hour == 1 / 300 * 3600
    text = format_status(status)
    assert "with 1 running (a trial takes ~300s)" in text
    assert f"  running b seed 1 on {host}:{dead.pid} for 2m00s (its process has ended" in text
    assert f"  running a seed 1 on {host}:{os.getpid()} for 2m00s\n" in text + "\n"
    # With every running trial's process ended, nothing is running: say how to go on.
    status = summarize("demo", rows, [trials[0], trials[2]], NOW, {"workers": 2, "threads": 1})
    assert status.eta_seconds is None
    assert "no trial is running: rerun the sweep's `kablate run` command" in format_status(status)
