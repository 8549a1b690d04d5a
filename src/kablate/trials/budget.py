"""The time budget: calibrate each variant's trial time, estimate the sweep, and cut it to fit.

Calibration times a few real training steps and one validation pass of every variant, under
the thread count the workers will use. A trial's time is then predicted as

    steps × step time + epochs × validation pass + checkpoints × checkpoint write + test pass

(the checkpoints the trainer's time-based policy writes, `checkpoint.n_checkpoints`)

and the sweep's time by replaying the job order on the workers, each taking the next job when
it is free (the way the queue hands them out: seed-major, the longest first within a seed,
`jobs.longest_first`). Because the order is seed-major, the jobs that fit a budget are a
complete comparison at fewer seeds, plus part of the next seed.
"""

from __future__ import annotations

import statistics
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import torch

from kablate.console import step
from kablate.costs.catalog import Catalog
from kablate.data.batches import train_batches
from kablate.data.prepare import PreparedData
from kablate.nets.build import build_network
from kablate.train.checkpoint import DEFAULT_CHECKPOINT_SECONDS, n_checkpoints, save_checkpoint
from kablate.train.loop import StepCount, evaluate, make_optimizer, set_lr, step_count, train_step
from kablate.trials.jobs import Job

N_WARMUP, N_TIMED = 2, 5


@dataclass(frozen=True)
class Calibration:
    variant_id: str
    step_seconds: float
    eval_seconds: float  # one pass over the validation split
    checkpoint_seconds: float
    trial_seconds: float


def time_steps(
    model, optimizer, data: PreparedData, recipe, steps: StepCount, n: int
) -> list[float]:
    """Seconds of ``n`` training steps, each timed from fetching its batch to the update, by
    the trainer's own step (its schedule and finiteness check included)."""
    model.train()
    times: list[float] = []
    epoch = 0
    while len(times) < n:
        batches = train_batches(
            data.train.images, data.train.labels, recipe.batch_size, 0, epoch, recipe.augment
        )
        start = time.perf_counter()
        for x, y in batches:
            set_lr(optimizer, recipe, len(times), steps)
            train_step(model, optimizer, x, y, recipe)
            now = time.perf_counter()
            times.append(now - start)
            start = now
            if len(times) >= n:
                break
        epoch += 1
    return times


def calibrate(
    catalog: Catalog,
    data: PreparedData,
    threads: int,
    checkpoint_seconds: float = DEFAULT_CHECKPOINT_SECONDS,
) -> dict[str, Calibration]:
    """Time every variant's steps; return predicted trial seconds by variant id."""
    torch.set_num_threads(threads)
    recipe = catalog.sweep.recipe
    steps = step_count(recipe, len(data.train.labels))
    out = {}
    # The first model a process trains pays one-off set-up costs: time it once, unrecorded.
    n = len(catalog.variants)
    step(
        "calibration",
        f"timing {N_TIMED} training steps, a validation pass and a checkpoint of each of {n} "
        "variants",
    )
    with tempfile.TemporaryDirectory(prefix="kablate-calibrate-") as tmp:
        for i, item in enumerate(catalog.variants[:1] + catalog.variants):
            if i:  # the first pass only warms up
                step("calibration", f"variant {i}/{n}: {item.name}")
            torch.manual_seed(0)
            model = build_network(item.blueprint).to(memory_format=torch.channels_last)
            optimizer = make_optimizer(model, recipe)
            times = time_steps(model, optimizer, data, recipe, steps, N_WARMUP + N_TIMED)
            step_seconds = statistics.median(times[N_WARMUP:])
            start = time.perf_counter()
            evaluate(model, data.val)
            val_seconds = time.perf_counter() - start
            start = time.perf_counter()
            state = {"model": model.state_dict(), "optimizer": optimizer.state_dict()}
            save_checkpoint(Path(tmp) / "c.pt", dict(state, best_state=model.state_dict()))
            ckpt_seconds = time.perf_counter() - start
            test_seconds = val_seconds * len(data.test.labels) / max(1, len(data.val.labels))
            epoch_seconds = steps.per_epoch * step_seconds + val_seconds
            n_saved = n_checkpoints(steps.epochs, epoch_seconds, checkpoint_seconds)
            trial = (
                steps.total * step_seconds
                + steps.epochs * val_seconds
                + n_saved * ckpt_seconds
                + test_seconds
            )
            out[item.variant.id] = Calibration(
                item.variant.id, step_seconds, val_seconds, ckpt_seconds, trial
            )
    return out


@dataclass
class Timetable:
    """What a budget buys: the jobs that start, in order, and the predicted times (not a kernel
    plan: that word is the sweep's)."""

    jobs: list[Job]
    starts: list[float]  # predicted start of each job, seconds after the run starts
    ends: list[float]
    n_fit: int  # the first n_fit jobs end within the budget
    total_seconds: float  # predicted time of all jobs
    fit_seconds: float  # predicted time of the jobs that fit

    def complete_seeds(self, seeds: list[int], n_variants: int, already: list[int]) -> list[int]:
        """The seeds at which every variant is finished or among the jobs that fit."""
        done = already + [j.seed for j in self.jobs[: self.n_fit]]
        return [s for s in seeds if done.count(s) == n_variants]


def schedule(
    jobs: list[Job],
    seconds: dict[str, float],
    n_workers: int,
    budget: float = 0.0,
    start: float = 0.0,
) -> Timetable:
    """Replay ``jobs`` in order on ``n_workers``, which are free from ``start`` seconds after
    the run starts; the jobs that end within ``budget`` fit.

    Like the workers, the replay stops at the first job that would overrun the budget.
    """
    free = [start] * max(1, n_workers)
    starts, ends, n_fit, fit_end = [], [], None, 0.0
    for i, job in enumerate(jobs):
        w = min(range(len(free)), key=free.__getitem__)
        start = free[w]
        end = start + seconds.get(job.variant_id, 0.0)
        free[w] = end
        starts.append(start)
        ends.append(end)
        if n_fit is None and budget and end > budget:
            n_fit = i
        if n_fit is None:
            fit_end = max(fit_end, end)
    total = max(ends, default=0.0)
    return Timetable(jobs, starts, ends, len(jobs) if n_fit is None else n_fit, total, fit_end)


def format_timetable(
    timetable: Timetable,
    budget: float,
    seeds: list[int],
    n_variants: int,
    staffing,
    already: list[int],
    bound: str = "",
) -> str:
    """The estimate and the order, as printed by --budget and --dry-run; ``bound`` (why the
    figure is an upper bound) ends the first line, which a run without --budget prints."""
    from kablate.trials.status import duration

    workers, threads = staffing
    lines = [
        f"estimate: {len(timetable.jobs)} trials to run take about "
        f"{duration(timetable.total_seconds)} "
        f"on {workers} worker(s) x {threads} thread(s)"
        + (
            f", of which ~{duration(timetable.starts[0])} is start-up and calibration"
            if timetable.starts and timetable.starts[0] >= 1
            else ""
        )
        + (f"; {bound}" if bound else "")
    ]
    if budget:
        complete = timetable.complete_seeds(seeds, n_variants, already)
        seeds_text = ", ".join(map(str, complete)) if complete else "none"
        lines.append(
            f"budget {duration(budget)}: {timetable.n_fit} of {len(timetable.jobs)} trials fit "
            f"(about {duration(timetable.fit_seconds)}); every variant complete at seeds: "
            f"{seeds_text}"
        )
    lines.append("order:")
    width = max((len(job.variant) for job in timetable.jobs), default=0)
    for i, job in enumerate(timetable.jobs):
        mark = " " if i < timetable.n_fit else "-"
        start, takes = duration(timetable.starts[i]), timetable.ends[i] - timetable.starts[i]
        lines.append(
            f" {mark} {i + 1:>4}  {job.variant:<{width}}  seed {job.seed:<3} "
            f"starts ~{start:>7}  takes ~{takes:.1f}s"
        )
    if timetable.n_fit < len(timetable.jobs):
        lines.append("  (- : does not fit the budget and will not start)")
    return "\n".join(lines)
