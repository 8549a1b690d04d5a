"""`kablate run`: cost the sweep, queue its jobs, run workers, export the results.

Rerunning the same command continues the sweep: finished trials never run again.
"""

from __future__ import annotations

import logging
import multiprocessing as mp
import os
import signal
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

from tqdm import tqdm

from kablate.costs.catalog import Catalog, build_catalog
from kablate.costs.export import variant_json
from kablate.data.prepare import prepare_data
from kablate.spec.loader import load_sweep
from kablate.trials.environment import environment, sanitize
from kablate.trials.export import CURVE_COLUMNS, TRIAL_COLUMNS, collect_trials, write_csv
from kablate.trials.jobs import order_jobs
from kablate.trials.meta import check_definition, definition, fingerprint, write_json
from kablate.trials.queue import enqueue_missing
from kablate.trials.results import DATA_FILE, PLAN_FILE, SWEEP_FILE
from kablate.trials.store import JOURNAL, open_study, redact, resolve_url
from kablate.trials.worker import WorkerContext, work

log = logging.getLogger("kablate")


@dataclass
class RunOptions:
    results_root: Path = Path("results")
    storage: str | None = None
    workers: int = 0  # 0: one single-thread worker per core, at most one per job
    threads: int = 0  # per worker; 0: cores // workers
    device: str = "cpu"
    budget_seconds: float = 0.0
    command: str = ""
    show_progress: bool = True


@dataclass
class RunSummary:
    results_dir: Path
    n_jobs: int
    n_new: int
    n_ran: int
    interrupted: bool = False
    counts: dict[str, int] = field(default_factory=dict)


def choose_layout(n_workers: int, n_threads: int, n_jobs: int) -> tuple[int, int]:
    """Workers × threads with workers × threads ≤ cores.

    Small models scale badly across threads, so the default is one single-thread worker per
    core (measured on a 2-core machine: see tests/bench/bench_workers.py).
    """
    cores = os.cpu_count() or 1
    workers = n_workers or max(1, min(cores, n_jobs))
    threads = n_threads or max(1, cores // workers)
    return workers, threads


def setup_logging(results_dir: Path, to_console: bool) -> None:
    logger = logging.getLogger("kablate")
    logger.setLevel(logging.INFO)
    for handler in list(logger.handlers):
        logger.removeHandler(handler)
    fmt = logging.Formatter("%(asctime)s %(levelname)s %(message)s", "%Y-%m-%d %H:%M:%S")
    results_dir.mkdir(parents=True, exist_ok=True)
    file_handler = logging.FileHandler(results_dir / "run.log")
    file_handler.setFormatter(fmt)
    logger.addHandler(file_handler)
    if to_console:
        console = logging.StreamHandler(sys.stderr)
        console.setFormatter(fmt)
        logger.addHandler(console)
    logger.propagate = False


def write_manifest(
    results_dir: Path, catalog: Catalog, url: str | None, opts: RunOptions, layout: tuple[int, int]
) -> None:
    sweep = catalog.sweep
    write_json(
        results_dir / SWEEP_FILE,
        {
            "name": sweep.name,
            "source": sanitize(sweep.source),
            "story": sweep.story,
            "fingerprint": fingerprint(definition(sweep)),
            "seeds": list(sweep.seeds),
            "baseline": catalog.baseline.variant.id,
            "storage_url": redact(url) if url else None,
            "storage": redact(url) if url else JOURNAL,
            "command": sanitize(opts.command),
            "environment": environment(),
            "workers": layout[0],
            "threads": layout[1],
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
                dict(variant_json(v), axes=[list(a) for a in v.variant.axes], grid=v.variant.grid)
                for v in catalog.variants
            ],
        },
    )


def export_results(results_dir: Path, study, plan: dict) -> dict[str, int]:
    rows, curves = collect_trials(study, plan)
    write_csv(results_dir / "trials.csv", rows, TRIAL_COLUMNS)
    write_csv(results_dir / "curves.csv", curves, CURVE_COLUMNS)
    counts: dict[str, int] = {}
    for row in rows:
        counts[row["status"]] = counts.get(row["status"], 0) + 1
    return counts


class StopFlag:
    """Set by the first Ctrl-C (SIGINT) or SIGTERM; a second Ctrl-C stops at once."""

    def __init__(self) -> None:
        self.stopped = False

    def __call__(self) -> bool:
        return self.stopped

    def install(self) -> None:
        def handler(signum, frame):
            if self.stopped:
                raise KeyboardInterrupt
            self.stopped = True
            log.warning(
                "stop requested: finishing the current batch, then putting the trial "
                "back in the queue"
            )

        signal.signal(signal.SIGINT, handler)
        signal.signal(signal.SIGTERM, handler)


def _worker_main(
    sweep_path: str, results_root: str, url: str | None, threads: int, device: str, deadline: float
) -> None:
    """Entry point of a worker process."""
    from kablate.train.loop import TrialInterrupted

    stop = StopFlag()
    stop.install()
    sweep = load_sweep(sweep_path)
    results_dir = Path(results_root) / sweep.name
    setup_logging(results_dir, to_console=False)
    catalog = build_catalog(sweep)
    study = open_study(sweep.name, results_dir, url)
    ctx = WorkerContext(
        catalog,
        prepare_data(sweep.data),
        study,
        results_dir,
        threads,
        device,
        should_stop=stop,
        deadline=deadline,
    )
    try:
        work(ctx)
    except TrialInterrupted:
        sys.exit(130)


def _progress(total: int, initial: int, enabled: bool) -> tqdm:
    return tqdm(
        total=total,
        initial=initial,
        unit="trial",
        disable=not enabled,
        dynamic_ncols=True,
        desc="trials",
    )


def run_sweep(sweep_path: Path, opts: RunOptions) -> RunSummary:
    """Run (or continue) the sweep in ``sweep_path``; return what happened.

    Raises:
        UsageError: a bad sweep file, a changed sweep definition, unusable storage.
    """
    from kablate.train.loop import TrialInterrupted

    sweep = load_sweep(sweep_path)
    catalog = build_catalog(sweep)
    results_dir = opts.results_root / sweep.name
    url = resolve_url(opts.storage)
    interactive = opts.show_progress and sys.stderr.isatty()
    setup_logging(results_dir, to_console=not interactive)
    study = open_study(sweep.name, results_dir, url)
    check_definition(study, sweep)
    jobs = order_jobs([(v.variant.id, v.name) for v in catalog.variants], sweep.seeds)
    workers, threads = choose_layout(opts.workers, opts.threads, len(jobs))
    write_manifest(results_dir, catalog, url, opts, (workers, threads))
    data = prepare_data(sweep.data)
    write_json(results_dir / DATA_FILE, data.manifest())
    plan = {
        "seeds": list(sweep.seeds),
        "variants": [variant_json(v, with_layers=False) for v in catalog.variants],
    }
    n_new = enqueue_missing(study, jobs)
    before = export_results(results_dir, study, plan)
    n_finished = before.get("done", 0) + before.get("diverged", 0)
    to_run = len(jobs) - n_finished
    log.info(
        "sweep %s: %d trials, %d already finished, %d to run on %d worker(s) x %d "
        "thread(s); storage %s",
        sweep.name,
        len(jobs),
        n_finished,
        to_run,
        workers,
        threads,
        redact(url) if url else results_dir / JOURNAL,
    )
    summary = RunSummary(results_dir, len(jobs), n_new, 0)
    if to_run:
        deadline = time.time() + opts.budget_seconds if opts.budget_seconds else 0.0
        stop = StopFlag()
        stop.install()
        bar = _progress(len(jobs), n_finished, interactive)
        try:
            if workers == 1:
                ctx = WorkerContext(
                    catalog,
                    data,
                    study,
                    results_dir,
                    threads,
                    opts.device,
                    should_stop=stop,
                    deadline=deadline,
                )
                summary.n_ran = work(ctx, on_finish=lambda key, status: bar.update(1))
            else:
                summary.n_ran = _run_processes(
                    sweep_path,
                    results_dir,
                    opts,
                    url,
                    workers,
                    threads,
                    deadline,
                    study,
                    plan,
                    bar,
                    n_finished,
                )
        except TrialInterrupted:
            pass
        finally:
            bar.close()
            signal.signal(signal.SIGINT, signal.default_int_handler)
            signal.signal(signal.SIGTERM, signal.SIG_DFL)
        summary.interrupted = stop.stopped
    summary.counts = export_results(results_dir, study, plan)
    return summary


def _run_processes(
    sweep_path: Path,
    results_dir: Path,
    opts: RunOptions,
    url: str | None,
    workers: int,
    threads: int,
    deadline: float,
    study,
    plan: dict,
    bar: tqdm,
    n_finished: int,
) -> int:
    ctx = mp.get_context("spawn")
    args = (str(sweep_path), str(opts.results_root), url, threads, opts.device, deadline)
    procs = [ctx.Process(target=_worker_main, args=args, daemon=False) for _ in range(workers)]
    for proc in procs:
        proc.start()
    last = n_finished
    while any(p.is_alive() for p in procs):
        time.sleep(1.0)
        counts = export_results(results_dir, study, plan)
        now = counts.get("done", 0) + counts.get("diverged", 0)
        bar.update(now - last)
        last = now
    for proc in procs:
        proc.join()
    return last - n_finished
