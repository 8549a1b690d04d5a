"""Racing over seeds end to end (trials/race.py): a plan that cannot see retires after seed 0,
the decision equals the full sweep's, and a resumed race never trains a retired variant.

The "blind" plan is our own construction: every 3×3 kernel dilated by the side of its input
(8 on the 8×8 digits, 4 on stage2's 4×4 map), so each off-centre tap of every conv lands in
the zero padding (PyTorch's Conv2d output formula with padding d: the taps sit at offsets ±d)
and the network sees one pixel at a time before the global pool. It costs the MACs of all-3
(its taps are counted) and stays near chance.
"""

from __future__ import annotations

import csv
from types import SimpleNamespace

import pytest

from kablate.lifecycle import RETIRED
from kablate.report import write_report
from kablate.results.columns import RETIRED_COLUMNS
from kablate.spec.schema import PickSpec
from kablate.trials import RunOptions, open_results, run_sweep
from kablate.trials.jobs import order_jobs
from kablate.trials.queue import enqueue_missing, job_status, tagged_trials
from kablate.trials.race import race_rule, read_rounds
from kablate.trials.store import JOURNAL, open_study
from tests.conftest import write_sweep
from tests.trials.runs import RACE_SWEEP


def sweep_file(folder, name, racing, seeds="[0, 1]"):
    return write_sweep(folder, RACE_SWEEP.format(name=name, racing=racing, seeds=seeds), name)


def table(path):
    with path.open() as fh:
        return {r["variant"]: r for r in csv.DictReader(fh)}


@pytest.mark.slow
def test_race_retires_the_blind_plan_and_decides_as_the_full_sweep(tmp_path):
    opts = RunOptions(results_root=tmp_path / "results", workers=1, show_progress=False)
    raced = run_sweep(sweep_file(tmp_path, "raced", "on"), opts)
    full = run_sweep(sweep_file(tmp_path, "full", "off"), opts)
    assert full.counts == {"done": 6}
    assert raced.counts.get(RETIRED, 0) >= 1 and raced.n_ran == raced.counts["done"] < 6
    cards = [write_report(open_results(s.results_dir), with_erf=False) for s in (raced, full)]
    ours, theirs = (table(s.results_dir / "variants.csv") for s in (raced, full))
    assert ours["blind"]["retired_after"] == "0"
    assert ours["blind"]["n_seeds"] == "1"
    assert ours["blind"]["retired_by"] in ("all-3", "stem-5")
    assert ours["blind"]["retired_why"] == "dominated"
    assert float(ours["blind"]["retired_bound"]) < -0.01  # its upper bound lies below −margin
    # the baseline is never retired; a variant in the race has every retired_* cell empty
    assert all(ours["all-3"][c] == "" for c in RETIRED_COLUMNS)
    assert not any(r["retired_after"] for r in theirs.values())
    pick = {name for name, r in ours.items() if r["recommended"] == "True"}
    assert pick == {name for name, r in theirs.items() if r["recommended"] == "True"}
    # The retired plan's interval comes from its own seed: present, and wider than on 2 seeds.
    assert float(ours["blind"]["val_acc_ci_low"]) <= float(ours["blind"]["val_acc_mean"])
    rows = table(raced.results_dir / "trials.csv")
    assert rows["blind"]["status"] == RETIRED  # its seed 1 (the last row of the variant)
    text = cards[0].read_text()
    assert "#### Racing over seeds" in text and "Known bias" in text
    assert "#### Racing over seeds" not in cards[1].read_text()


@pytest.mark.slow
def test_a_resumed_race_never_trains_a_retired_variant(tmp_path):
    opts = RunOptions(results_root=tmp_path / "results", workers=1, show_progress=False)
    first = run_sweep(sweep_file(tmp_path, "resumed", "on", seeds="[0]"), opts)
    assert first.counts == {"done": 3}
    folder = open_results(first.results_dir)
    rounds = read_rounds(folder.study)
    retired = set(rounds[0]["retired"])
    names = {v["id"]: v["name"] for v in folder.plan["variants"]}
    assert "blind" in {names[v] for v in retired}
    # As if an earlier run without racing had queued every job of two seeds: the retired
    # variants' waiting trials must be withdrawn, not trained.
    writable = open_study("resumed", first.results_dir, None)
    enqueue_missing(writable, order_jobs(list(names.items()), (0, 1)))
    second = run_sweep(sweep_file(tmp_path, "resumed", "on", seeds="[0, 1]"), opts)
    by_job = tagged_trials(open_results(second.results_dir).study)
    for vid in names:
        status, trial = job_status(by_job[f"{vid}-s1"])
        if vid in retired:
            assert status == RETIRED and "val_acc" not in trial.user_attrs
        else:
            assert status == "done"
    assert second.n_ran == len(names) - len(retired)


@pytest.mark.slow
@pytest.mark.postgres
@pytest.mark.timeout(900)  # two sweeps, each on two worker processes: minutes when busy
def test_a_race_of_two_workers_on_postgresql_retires_what_it_retires_on_the_journal(
    tmp_path, postgres_url
):
    found = {}
    for label, url in (("journal", None), ("postgres", postgres_url)):
        opts = RunOptions(
            results_root=tmp_path / label, storage=url, workers=2, show_progress=False
        )
        summary = run_sweep(sweep_file(tmp_path, "shared", "on"), opts)
        folder = open_results(summary.results_dir)
        assert folder.meta["storage"] == (url or JOURNAL)
        names = {v["id"]: v["name"] for v in folder.plan["variants"]}
        rounds = read_rounds(folder.study)
        found[label] = (
            {seed: sorted(names[v] for v in r["retired"]) for seed, r in rounds.items()},
            summary.counts,
        )
    assert found["postgres"] == found["journal"]
    retired, counts = found["postgres"]
    assert "blind" in retired[0]  # decided after seed 0, by the workers on the server
    assert counts == {"done": 6 - len(retired[0]), RETIRED: len(retired[0])}


@pytest.mark.parametrize(
    ("cost", "raced_by"),
    [("macs", "macs"), ("params", "params"), ("memory", "memory"), ("latency", "macs"),
     ("ort_latency", "macs")],
)  # fmt: skip
def test_a_race_on_a_timed_cost_compares_by_macs(cost, raced_by):
    # Runners sharing a study must agree on who costs no more, and a timing differs between
    # machines and runs (CPU and ONNX Runtime latency alike): the race falls back to MACs.
    sweep = SimpleNamespace(pick=PickSpec(cost=cost))
    rule = race_rule(sweep, "v0")
    assert rule["cost"] == raced_by and rule["baseline"] == "v0"
    assert rule["futility"] is True
    assert race_rule(SimpleNamespace(pick=PickSpec(rule="one-se")), "v0")["futility"] is False
