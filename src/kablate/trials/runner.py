"""`kablate run`: cost the sweep, queue its jobs, run workers, export the results.

Rerunning the same command continues the sweep: finished trials never run again.
"""

from __future__ import annotations

import hashlib
import logging
import os
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

from kablate.console import FILE_ONLY, step
from kablate.costs.catalog import Catalog, build_catalog, measure_latencies
from kablate.costs.plan_output import variant_json
from kablate.data.prepare import prepare_data
from kablate.errors import UsageError
from kablate.lifecycle import FINISHED, RETIRED
from kablate.results.paths import DATA_FILE, JOURNAL, PLAN_FILE, SWEEP_FILE
from kablate.results.redact import redact, sanitize, strip_password
from kablate.results.tables import write_trial_tables
from kablate.results.write import writable_folder, write_json
from kablate.spec.loader import load_sweep
from kablate.train.checkpoint import DEFAULT_CHECKPOINT_SECONDS
from kablate.train.device import check_device
from kablate.train.loop import warm_up
from kablate.trials.budget import calibrate, format_timetable, schedule
from kablate.trials.environment import environment
from kablate.trials.halving import start_halving
from kablate.trials.jobs import Job, longest_first, sweep_jobs
from kablate.trials.liveness import liveness_for
from kablate.trials.meta import check_definition, definition, fingerprint
from kablate.trials.outcome import failure_reasons, own_counts
from kablate.trials.pool import (
    RunContext,
    Staffing,
    SweepProgress,
    detach_run_log,
    run_workers,
    setup_logging,
    worker_main,
)
from kablate.trials.preflight import run_preflight
from kablate.trials.queue import enqueue_missing, withdraw_halted
from kablate.trials.race import racing_wanted, start_race
from kablate.trials.rows import collect_trials, settled_jobs
from kablate.trials.search import refuse_search_run
from kablate.trials.search_estimate import search_estimate
from kablate.trials.search_run import run_search
from kablate.trials.standby import READY_TIMEOUT, Standby, WorkerSetup
from kablate.trials.store import lock_dir, open_study, resolve_url, storage_exists

log = logging.getLogger("kablate")


@dataclass
class RunOptions:
    results_root: Path = Path("results")
    storage: str | None = None
    workers: int = 0  # 0: one single-thread worker per core, at most one per job
    threads: int = 0  # per worker; 0: cores // workers
    device: str = "cpu"
    budget_seconds: float = 0.0
    dry_run: bool = False  # calibrate and print the estimate and order; train nothing
    checkpoint_seconds: float = DEFAULT_CHECKPOINT_SECONDS  # train/checkpoint.py's policy
    command: str = ""
    show_progress: bool = True
    echo: Callable[[str], None] | None = None  # where the estimate is printed (the CLI's)


@dataclass
class RunSummary:
    results_dir: Path
    n_jobs: int
    n_new: int
    n_ran: int
    interrupted: bool = False
    counts: dict[str, int] = field(default_factory=dict)
    staffing: Staffing = Staffing(1, 1)
    estimate: str = ""  # the printed estimate (--budget, --dry-run)
    n_to_run: int = 0  # trials not finished when the run started
    budget_seconds: float = 0.0
    failures: dict[str, int] = field(default_factory=dict)  # reason → failed trials
    disk_full: str = ""  # the message, when a full disk stopped the run
    # With --budget: seconds left when the workers ended, and the estimate of the shortest trial
    # still waiting (0 when none is); `outcome.verdict` tells the budget's end from a failure.
    budget_left: float = 0.0
    shortest_waiting: float = 0.0


def choose_staffing(n_workers: int, n_threads: int, n_jobs: int) -> Staffing:
    """Workers × threads with workers × threads ≤ cores.

    Small models scale badly across threads, so the default is one single-thread worker per
    core (measured on a 2-core machine: 2 x 1 trains the quickstart sweep faster than 1 x 2,
    see tests/bench/bench_runner.py).
    """
    cores = os.cpu_count() or 1
    workers = n_workers or max(1, min(cores, n_jobs))
    threads = n_threads or max(1, cores // workers)
    if workers * threads > cores:
        log.warning(
            "%d worker(s) x %d thread(s) is more than the %d cores: they will slow each other",
            workers,
            threads,
            cores,
        )
    return Staffing(workers, threads)


def file_sha256(path: Path) -> str | None:
    """The SHA-256 of the sweep file as it was run (its includes are in the fingerprints)."""
    return hashlib.sha256(path.read_bytes()).hexdigest() if path.is_file() else None


def write_manifest(
    results_dir: Path,
    catalog: Catalog,
    url: str | None,
    opts: RunOptions,
    staffing: tuple[int, int],
) -> None:
    sweep = catalog.sweep
    write_json(
        results_dir / SWEEP_FILE,
        {
            "name": sweep.name,
            "source": sanitize(sweep.source),
            "story": sweep.story,
            "fingerprint": fingerprint(definition(sweep)),  # network, recipe, data
            "sweep_fingerprint": fingerprint(sweep.raw),  # everything resolved, plans included
            "file_sha256": file_sha256(Path(sweep.source)),
            "seeds": list(sweep.seeds),
            "baseline": catalog.baseline.variant.id,
            "storage_url": strip_password(url) if url else None,
            "storage": strip_password(url) if url else JOURNAL,
            "command": redact(sanitize(opts.command)),
            "environment": environment(),
            "workers": staffing[0],
            "threads": staffing[1],
            "device": opts.device,
            "budget_seconds": opts.budget_seconds,
            "resolved": sweep.raw,
            "grids": [{g: list(v) for g, v in grid.items()} for grid in sweep.grids],
            "dropped": [{"name": item.name, "reason": reason} for item, reason in catalog.dropped],
        },
    )
    write_json(
        results_dir / PLAN_FILE,
        {
            "seeds": list(sweep.seeds),
            "baseline": catalog.baseline.variant.id,
            "in_shape": list(catalog.in_shape),
            "n_classes": catalog.n_classes,
            "variants": [
                dict(
                    variant_json(v, baseline=catalog.baseline.latency),
                    axes=[list(a) for a in v.variant.axes],
                    grid=v.variant.grid,
                )
                for v in catalog.variants
            ],
        },
    )


def export_results(results_dir: Path, study, roster: dict) -> dict[str, int]:
    rows, curves = collect_trials(study, roster)
    write_trial_tables(results_dir, rows, curves)
    counts: dict[str, int] = {}
    for row in rows:
        counts[row["status"]] = counts.get(row["status"], 0) + 1
    return counts


def estimate(
    catalog: Catalog,
    data,
    jobs: list[Job],
    done: set[str],
    staffing,
    opts: RunOptions,
    started=None,
    bound: str = "",
):
    """Calibrate and replay the remaining jobs; (seconds by variant id, printed text).
    ``bound``: why the figure is only an upper bound (`upper_bound`), or empty.

    The replay starts when the workers can take their first job: after what the run has spent
    so far (since ``started``, the run's start time; for a dry run, this calibration and the
    set-up before it) or, for worker processes, after their own start-up if that is longer
    (in a run they are ready by now: `wait_for_workers`; a dry run starts none). That start-up
    repeats this process's (imports, sweep, data: its CPU time so far) plus torch's warm-up.
    """
    budget = opts.budget_seconds
    step("calibration", "warming torch up")
    before = time.process_time()
    clock = time.perf_counter()
    warm_up(catalog.sweep.recipe)
    startup = before + (time.perf_counter() - clock)
    calibration = calibrate(catalog, data, staffing.threads, opts.checkpoint_seconds)
    spent = time.time() - started if started is not None else before + time.perf_counter() - clock
    offset = max(spent, startup) if staffing.workers > 1 else spent
    seconds = {vid: c.trial_seconds for vid, c in calibration.items()}
    remaining = longest_first([j for j in jobs if j.key not in done], seconds)
    timetable = schedule(remaining, seconds, staffing.workers, budget, start=offset)
    text = format_timetable(
        timetable,
        budget,
        list(catalog.sweep.seeds),
        len(catalog.variants),
        staffing,
        already=[j.seed for j in jobs if j.key in done],
        bound=bound,
    )
    return seconds, text


def wait_for_workers(standby: Standby) -> None:
    """Wait until the workers started early have prepared: the latencies and the calibration
    that follow are timed on cores where no process imports torch any more."""
    n = len(standby.waiting)
    step("start-up", f"waiting for {n} worker processes to prepare before timing anything")
    late = standby.wait_until_idle()
    if late:
        log.warning(
            "%d of %d workers still preparing after %.0f s; the latencies and the estimate are "
            "timed anyway and may be inflated",
            len(late),
            n,
            READY_TIMEOUT,
        )


def upper_bound(racing: bool, halving: bool) -> str:
    """Why an estimate that counts every trial left at full length is an upper bound: the
    modes that train fewer trials, or shorter ones, as the evidence comes in ('' without)."""
    modes = [
        *(["racing may retire variants"] if racing else []),
        *(["halving may stop trials early, and their variants with them"] if halving else []),
    ]
    if not modes:
        return ""
    return f"an upper bound: {' and '.join(modes)}, which cannot be known in advance"


def brief(text: str) -> str:
    """The estimate's first line, and how it was made (a run without --budget prints this)."""
    return (
        text.splitlines()[0] + "\n(from timing a few training steps of each variant on this "
        "machine; while trials run, the ETA corrects it by their measured times; run.log and "
        "`--dry-run` list the order)"
    )


def dry_run(sweep_path: Path, opts: RunOptions) -> RunSummary:
    """Calibrate and print the estimate and order without training or writing results."""
    step("start-up", f"reading {sweep_path} and costing its variants")
    sweep = load_sweep(sweep_path)
    catalog = build_catalog(sweep)
    results_dir = opts.results_root / sweep.name
    url = resolve_url(opts.storage)
    jobs = sweep_jobs(catalog)
    staffing = choose_staffing(opts.workers, opts.threads, len(jobs))
    done: set[str] = set()
    races = sweep.racing == "on" or (sweep.racing == "auto" and bool(opts.budget_seconds))
    if storage_exists(results_dir, url):
        try:
            study = open_study(sweep.name, results_dir, url, create=False)
            done = settled_jobs(study, jobs)
            races = racing_wanted(sweep.racing, opts.budget_seconds, study)
        except UsageError:
            done = set()
    if jobs and len(done) == len(jobs):  # nothing to calibrate or order
        text = (
            f"every one of the {len(jobs)} trials of sweep {sweep.name} has already finished, "
            f"in {results_dir}: `kablate run` would train nothing; `kablate report "
            f"{results_dir}` rebuilds the report"
        )
        if opts.echo:
            opts.echo(text)
        summary = RunSummary(results_dir, len(jobs), 0, 0, staffing=staffing, estimate=text)
        summary.counts = {"done": len(done)}
        return summary
    step("start-up", f"preparing the data ({sweep.data.source}) and the preflight")
    data = prepare_data(sweep.data)
    if sweep.search is not None:  # the search and an upper bound for its finalists
        staffing = choose_staffing(opts.workers, opts.threads, sweep.search.budget)
        text = search_estimate(catalog, data, staffing)
        if opts.echo:
            opts.echo(text)
        return RunSummary(results_dir, len(jobs), 0, 0, staffing=staffing, estimate=text)
    run_preflight(catalog, data, staffing.workers, opts.device)
    from kablate.analysis.power import plan_note  # statsmodels: only a dry run needs it here

    bound = upper_bound(races, sweep.halving.enabled)
    _, text = estimate(catalog, data, jobs, done, staffing, opts, bound=bound)
    text += "\n" + plan_note(len(data.val.labels), sweep.pick.margin, len(sweep.seeds))
    if opts.echo:
        opts.echo(text)
    summary = RunSummary(results_dir, len(jobs), 0, 0, staffing=staffing, estimate=text)
    summary.counts = {"done": len(done), "waiting": len(jobs) - len(done)}
    return summary


def run_sweep(sweep_path: Path, opts: RunOptions) -> RunSummary:
    """Run (or continue) the sweep in ``sweep_path``; return what happened.

    Raises:
        UsageError: a bad sweep file, a changed sweep definition, unusable storage.
    """
    check_device(opts.device)
    if opts.dry_run:
        return dry_run(sweep_path, opts)
    try:
        return _run_sweep(sweep_path, opts)
    finally:
        detach_run_log()


def _run_sweep(sweep_path: Path, opts: RunOptions) -> RunSummary:
    started, started_at = time.time(), datetime.now()  # Optuna's trial times are naive local
    step("start-up", f"reading {sweep_path} and costing its variants")
    sweep = load_sweep(sweep_path)
    if opts.budget_seconds:  # the budget's schedule does not count the search's trials yet
        refuse_search_run(sweep)
    catalog = build_catalog(sweep)
    results_dir = opts.results_root / sweep.name
    url = resolve_url(opts.storage)
    interactive = opts.show_progress and sys.stderr.isatty()
    writable_folder(results_dir, "results folder", "; choose another with --results DIR")
    setup_logging(results_dir, to_console=not interactive, steps_on_console=True)
    study = open_study(sweep.name, results_dir, url)
    step("start-up", f"preparing the data ({sweep.data.source})")
    data = prepare_data(sweep.data)
    if sweep.search is not None:  # search first, on every worker, then train its finalists
        search_staffing = choose_staffing(opts.workers, opts.threads, sweep.search.budget)
        sweep = run_search(
            catalog,
            data,
            results_dir,
            url,
            search_staffing,
            opts.device,
            sweep_path,
            opts.results_root,
        )
        catalog = build_catalog(sweep)
    jobs = sweep_jobs(catalog)
    staffing = choose_staffing(opts.workers, opts.threads, len(jobs))
    standby = None
    try:
        # Worker processes start now and prepare (imports, sweep, data) while this one runs the
        # preflight; nothing is timed until they are ready (standby.py).
        if staffing.workers > 1 and len(settled_jobs(study, jobs)) < len(jobs):
            setup = WorkerSetup(
                str(sweep_path),
                str(opts.results_root),
                url,
                staffing.threads,
                opts.device,
                opts.checkpoint_seconds,
            )
            standby = Standby(worker_main, setup, staffing.workers)
        n_variants = len(catalog.variants)
        step(
            "start-up",
            f"preflight: the memory of {n_variants} variants, and one training step of the most "
            "expensive",
        )
        # Before the definition is recorded: a sweep refused here can be fixed and rerun as is.
        run_preflight(catalog, data, staffing.workers, opts.device)
        check_definition(study, sweep)
        # Latency once per variant, before training, on [target] (else at the workers' threads):
        # the report's fronts and `[pick] cost = "latency"` read it from there.
        threads = catalog.sweep.target.threads or staffing.threads
        if standby is not None:
            wait_for_workers(standby)
        step("start-up", f"measuring the latency of {n_variants} variants at {threads} thread(s)")
        measure_latencies(catalog, threads=threads)
        write_manifest(results_dir, catalog, url, opts, staffing)
        write_json(results_dir / DATA_FILE, data.manifest())
        roster = {  # the variants and seeds whose rows count: plan.json without the layers
            "seeds": list(sweep.seeds),
            "variants": [
                variant_json(v, with_layers=False, baseline=catalog.baseline.latency)
                for v in catalog.variants
            ],
        }
        liveness = liveness_for(study, lock_dir(results_dir, url))
        liveness.recover(study)
        # Racing (trials/race.py): only the rounds decided so far are enqueued; workers go on.
        race = start_race(study, catalog, data.val.labels, sweep.racing, opts.budget_seconds)
        halving = start_halving(
            study, sweep
        )  # successive halving inside trials (trials/halving.py)
        with liveness.queue_lock():
            withdraw_halted(study, liveness)  # a variant stopped on a seed gets no more seeds
            n_new = race.advance(study, liveness) if race else enqueue_missing(study, jobs)
        before = export_results(results_dir, study, roster)
        n_finished = sum(before.get(status, 0) for status in FINISHED)
        n_dropped = before.get(RETIRED, 0)  # racing retired or halving stopped their variant
        to_run = len(jobs) - n_finished - n_dropped
        log.info(
            "sweep %s: %d trials, %d already finished, %d not run (variant retired or stopped), "
            "%d to run on %d worker(s) x %d thread(s); storage %s",
            sweep.name,
            len(jobs),
            n_finished,
            n_dropped,
            to_run,
            *staffing,
            redact(url) if url else results_dir / JOURNAL,
        )
        summary = RunSummary(results_dir, len(jobs), n_new, 0, staffing=staffing, n_to_run=to_run)
        summary.budget_seconds = opts.budget_seconds
        seconds: dict[str, float] = {}
        if (
            to_run
        ):  # with or without --budget: the estimate, and the predictions the ETA starts from
            done = settled_jobs(study, jobs)
            bound = upper_bound(race is not None, halving is not None)
            seconds, summary.estimate = estimate(
                catalog, data, jobs, done, staffing, opts, started, bound
            )
            # Into run.log; on the console only through ``echo`` when there is one (not twice).
            log.info("%s", summary.estimate, extra={FILE_ONLY: opts.echo is not None})
            if opts.echo:  # without --budget, the order is only in run.log
                opts.echo(summary.estimate if opts.budget_seconds else brief(summary.estimate))
        if to_run:
            deadline = started + opts.budget_seconds if opts.budget_seconds else 0.0
            step("sweep", f"training {to_run} trials on {staffing.workers} worker(s)")
            progress = SweepProgress(
                len(jobs),
                n_finished,
                interactive,
                predicted={j.key: seconds.get(j.variant_id, 0.0) for j in jobs},
                n_workers=staffing.workers,
                since=started_at,
            )
            progress.settle(
                collect_trials(study, roster)[0]
            )  # a resumed run's jobs that will not run
            pool = run_workers(
                RunContext(
                    sweep_path=sweep_path,
                    results_root=opts.results_root,
                    results_dir=results_dir,
                    device=opts.device,
                    url=url,
                    staffing=staffing,
                    deadline=deadline,
                    estimates=seconds,
                    catalog=catalog,
                    data=data,
                    study=study,
                    liveness=liveness,
                    roster=roster,
                    jobs=jobs,
                    progress=progress,
                    checkpoint_seconds=opts.checkpoint_seconds,
                    standby=standby,
                )
            )
            own = own_counts(study, pool.worker_names, started_at)
            summary.n_ran = sum(own[s] for s in FINISHED)
            summary.interrupted, summary.disk_full = pool.interrupted, pool.disk_full
            if deadline:
                summary.budget_left = max(0.0, deadline - time.time())
                over = settled_jobs(study, jobs)
                waiting = [seconds.get(j.variant_id, 0.0) for j in jobs if j.key not in over]
                summary.shortest_waiting = min(waiting, default=0.0)
        if summary.disk_full:  # the study is consistent; writing the tables may not fit
            summary.counts = {}
            return summary
        step("sweep", "writing trials.csv and curves.csv")
        summary.counts = export_results(results_dir, study, roster)
        # A job whose variant gets no more seeds is not a failure, whatever its last trial did.
        settled = settled_jobs(study, jobs)
        summary.failures = dict(
            failure_reasons(study, [j.key for j in jobs if j.key not in settled])
        )
        if summary.interrupted:
            log.warning(
                "stopped; resume with the same command: %s", opts.command or "kablate run ..."
            )
        return summary
    finally:
        if standby is not None:  # the workers not released: a failed or empty preparation
            standby.close()
