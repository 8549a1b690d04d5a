"""The workers of one machine: in this process or as processes, their signals, their progress.

Several single-thread processes use a small CPU better than one process with more threads; they
are started early and stand by while the runner prepares (standby.py). A worker that dies is
replaced; its trial is recovered by the next claim (liveness.py). Ctrl-C or SIGTERM stops every
worker at its next batch: each checkpoints the batches done and puts its trial back in the queue.
"""

from __future__ import annotations

import contextlib
import logging
import os
import signal
import sys
import threading
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from multiprocessing.connection import wait as wait_any
from pathlib import Path
from typing import TYPE_CHECKING, NamedTuple

from optuna.trial import FrozenTrial
from tqdm import tqdm

from kablate.console import LOG_DATE_FORMAT, LOG_FORMAT, Steps, console_handler
from kablate.costs.catalog import Catalog, build_catalog
from kablate.data.prepare import PreparedData, prepare_data
from kablate.errors import EXIT_DISK_FULL, EXIT_STOPPED, DiskFullError, is_disk_full
from kablate.lifecycle import DONE, RETIRED, RUNNING, SETTLED, JobKey, is_finished, n_finished
from kablate.results.paths import RUN_LOG
from kablate.spec.loader import load_sweep
from kablate.teardown import exit_without_teardown
from kablate.trials.eta import eta_seconds
from kablate.trials.jobs import Job, claim_order, sweep_jobs
from kablate.trials.liveness import Liveness, liveness_for, process_name
from kablate.trials.queue import trial_status
from kablate.trials.rows import collect_trials
from kablate.trials.search_run import recorded_finalists
from kablate.trials.standby import Release, Standby, WorkerSetup, spawn, wait_for_release
from kablate.trials.status import duration
from kablate.trials.store import lock_dir, open_study
from kablate.trials.worker import WorkerContext, work

if TYPE_CHECKING:
    import optuna

log = logging.getLogger("kablate")


class RunLogHandler(logging.FileHandler):
    """run.log: a line that does not fit on a full disk is dropped without a traceback (the
    console still shows it, and the run stops with its own message)."""

    def handleError(self, record: logging.LogRecord) -> None:  # noqa: N802 (logging's name)
        if not is_disk_full(sys.exc_info()[1]):
            super().handleError(record)


def setup_logging(results_dir: Path, to_console: bool, steps_on_console: bool = False) -> None:
    """run.log in ``results_dir``, and the console: every line (``to_console``), only the
    steps (`console.step`; ``steps_on_console``, for a terminal with a progress bar), or none
    (worker processes)."""
    logger = logging.getLogger("kablate")
    logger.setLevel(logging.INFO)
    for handler in list(logger.handlers):
        logger.removeHandler(handler)
    results_dir.mkdir(parents=True, exist_ok=True)
    file_handler = RunLogHandler(results_dir / RUN_LOG)
    file_handler.setFormatter(logging.Formatter(LOG_FORMAT, LOG_DATE_FORMAT))
    logger.addHandler(file_handler)
    if to_console or steps_on_console:
        logger.addHandler(console_handler(steps_only=not to_console))
    logger.propagate = False


def detach_run_log() -> None:
    """Close and remove run.log's handler: once `run_sweep` returns, what the same process logs
    next (a report written with --out, say) does not go into that results folder."""
    logger = logging.getLogger("kablate")
    for handler in list(logger.handlers):
        if isinstance(handler, RunLogHandler):
            logger.removeHandler(handler)
            handler.close()


class StopFlag:
    """Set by Ctrl-C (SIGINT) or SIGTERM: the trial stops at its next batch and is requeued.

    In the runner, the first signal is also passed on to the worker processes (a terminal
    sends Ctrl-C to all of them anyway; ``kill -INT`` reaches only the runner), and a second
    one stops at once: the workers are killed, and their trials are recovered on the next run.
    """

    def __init__(self, forward: Callable[[int], None] | None = None, escalate: bool = True) -> None:
        self.stopped = False
        self.forward = forward
        self.escalate = escalate  # False in worker processes: they may get Ctrl-C twice

    def __call__(self) -> bool:
        return self.stopped

    def install(self) -> None:
        def handler(signum, frame):
            if self.stopped and self.escalate:
                raise KeyboardInterrupt
            if not self.stopped:
                self.stopped = True
                if self.escalate:
                    log.warning(
                        "stop requested: each worker finishes its current batch and puts its "
                        "trial back in the queue (a second Ctrl-C stops at once)"
                    )
                if self.forward is not None:
                    self.forward(signum)

        signal.signal(signal.SIGINT, handler)
        signal.signal(signal.SIGTERM, handler)


def worker_main(setup: WorkerSetup, release: Release | None, conn=None) -> None:
    """Entry point of a worker process: prepare (imports, sweep, data, torch's warm-up), then,
    when started early (``release`` None), wait on ``conn`` for the runner's release."""
    from kablate.train.loop import TrialInterrupted, warm_up

    stop = StopFlag(escalate=False)
    stop.install()
    sweep = load_sweep(setup.sweep_path)
    results_dir = Path(setup.results_root) / sweep.name
    sweep = recorded_finalists(sweep, results_dir)  # a [search] sweep trains its finalists
    setup_logging(results_dir, to_console=False)
    catalog = build_catalog(sweep)
    data = prepare_data(sweep.data)
    warm_up(sweep.recipe)
    if release is None:
        release = wait_for_release(conn)
        if release is None:  # dismissed, or the runner is gone
            return
    study = open_study(sweep.name, results_dir, setup.url)
    ctx = WorkerContext(
        catalog,
        data,
        study,
        results_dir,
        setup.threads,
        setup.device,
        should_stop=stop,
        deadline=release.deadline,
        liveness=liveness_for(study, lock_dir(results_dir, setup.url)),
        order=claim_order(sweep_jobs(catalog), release.estimates),
        estimates=release.estimates,
        checkpoint_seconds=setup.checkpoint_seconds,
    )
    code = 0
    try:
        work(ctx)
    except TrialInterrupted:
        code = EXIT_STOPPED
    except DiskFullError as exc:
        log.error("%s", exc)
        code = EXIT_DISK_FULL
    # Its trials are told and its log is written: the runner waits on this process's exit
    # (`supervise`), so it leaves without seconds of torch's teardown.
    exit_without_teardown(code)


# tqdm's default bar without its own remaining time and rate: the ETA shown is kablate's.
BAR_FORMAT = "{desc}: {percentage:3.0f}%|{bar}| {n_fmt}/{total_fmt} [{elapsed} elapsed{postfix}]"


class SweepProgress:
    """The sweep's progress: a tqdm bar on a terminal, otherwise a timestamped log line whenever
    a trial finishes and after every silence (`console.Steps`); one ETA (eta.py) in both.

    Args:
        predicted: job key → the calibration's predicted seconds, for every job of the sweep.
        n_workers: the run's workers.
        since: the run's start, naive local time like Optuna's: trials claimed after it are
            this run's, and their times correct the predictions.
    """

    def __init__(
        self,
        total: int,
        initial: int,
        interactive: bool,
        predicted: dict[str, float] | None = None,
        n_workers: int = 1,
        since: datetime | None = None,
    ) -> None:
        self.total, self.n = total, initial
        self.n_jobs = total  # the sweep's; ``total`` leaves out the jobs that will not run
        self.dropped: set[str] = set()  # job keys not run: racing retired or halving stopped
        self.n_rounds = 0  # seeds whose every job is finished or not run
        self.predicted, self.n_workers = predicted or {}, n_workers
        self.since = since or datetime.now()
        self.measured: dict[str, float] = {}  # this run's finished trials: seconds
        self.done: set[str] = set()
        self.started: dict[str, datetime] = {}  # running trials: claimed at
        self.lock = threading.Lock()
        self.bar = tqdm(
            total=total,
            initial=initial,
            unit="trial",
            disable=not interactive,
            dynamic_ncols=True,
            desc="trials",
            bar_format=BAR_FORMAT,
        )

    def observe(self, trials: list[FrozenTrial]) -> None:
        """Take the finished and running trials from the study's ``trials``."""
        measured, done, started = {}, set(), {}
        for t in trials:
            key = t.user_attrs.get("job")
            if key is None:
                continue
            status = trial_status(t)
            if is_finished(status):
                done.add(key)
                # A diverged trial stops early: its time says nothing of the others'.
                if status == DONE and t.datetime_start and t.datetime_start >= self.since:
                    measured[key] = (t.datetime_complete - t.datetime_start).total_seconds()
            elif status == RUNNING and t.datetime_start:
                started[key] = t.datetime_start
        with self.lock:
            self.measured, self.done, self.started = measured, done, started

    def eta(self) -> float | None:
        now = datetime.now()
        with self.lock:
            running = {k: (now - t).total_seconds() for k, t in self.started.items()}
            done = self.done | self.dropped  # a job that will not run takes no time
            return eta_seconds(self.predicted, self.measured, done, running, self.n_workers)

    def line(self) -> str:
        """'progress: 3/15 trials finished, 2 running, ETA 1m10s'; sets the bar's ETA too.

        Before this run's first trial is claimed the workers are still starting (imports,
        data), which the ETA does not cover: the line says so instead of giving one.
        """
        text = f"progress: {self.n}/{self.total} trials finished"
        with self.lock:
            starting = not self.started and not self.measured
            if self.started:
                text += f", {len(self.started)} running"
        if self.n >= self.total:
            return text
        if starting:
            return text + "; the workers are starting"
        eta = self.eta()
        if eta is not None:
            text += f", ETA {duration(eta)}"
            self.bar.set_postfix_str(f"ETA {duration(eta)}", refresh=True)
        return text

    def update(self, n_finished: int) -> None:
        if n_finished == self.n:
            return
        self.bar.update(n_finished - self.n)
        self.n = n_finished
        log.info("%s", self.line())

    def settle(self, rows: list[dict]) -> None:
        """Take the jobs that will not run from the sweep's rows (`collect_trials`: their
        variant was retired by racing or stopped by halving): they leave the total and the ETA.
        After each seed round (every job of the seed finished or not run), and whenever jobs
        are dropped, log the re-plan: the trials left and the new ETA."""
        dropped = {str(JobKey(r["variant_id"], r["seed"])) for r in rows if r["status"] == RETIRED}
        complete: dict[int, bool] = {}
        for r in rows:
            complete[r["seed"]] = complete.get(r["seed"], True) and r["status"] in SETTLED
        rounds = [seed for seed, done in complete.items() if done]
        if dropped == self.dropped and len(rounds) == self.n_rounds:
            return
        self.dropped, self.n_rounds = dropped, len(rounds)
        self.total = self.n_jobs - len(dropped)
        self.bar.total = self.total
        self.bar.refresh()
        eta = self.eta()
        log.info(
            "re-plan%s: %d trial(s) left to run, %d not run (variant retired by racing or "
            "stopped by halving), ETA %s",
            f" after seed {rounds[-1]}" if rounds else "",
            max(0, self.total - self.n),
            len(dropped),
            duration(eta) if eta is not None else "unknown",
        )

    def pulse(self, trials: Callable[[], list[FrozenTrial]]) -> Callable[[], str]:
        """What `console.Steps` logs after a silence while trials run: fresh trials, the line."""

        def line() -> str:
            if self.n >= self.total:
                return "sweep: every trial has finished; the workers are exiting"
            self.observe(trials())
            text = self.line()
            self.bar.refresh()  # its elapsed time moves on a terminal too
            return text

        return line

    def close(self) -> None:
        self.bar.close()


class Staffing(NamedTuple):
    """How a run is staffed: worker processes, and torch threads in each (not a network's
    layout: that word is `nets.layout`'s)."""

    workers: int
    threads: int


@dataclass
class RunContext:
    """What the runner hands its workers: the sweep, where it runs, and how."""

    sweep_path: Path
    results_root: Path  # the workers' --results; the sweep's own folder is results_dir
    results_dir: Path
    device: str
    url: str | None  # the storage; None: the folder's journal file
    staffing: Staffing
    deadline: float  # time.time() by which every started trial should end; 0: none
    estimates: dict[str, float]  # variant id → predicted trial seconds
    catalog: Catalog
    data: PreparedData
    study: optuna.Study
    liveness: Liveness
    roster: dict  # the variants and seeds whose rows count (`collect_trials`)
    jobs: list[Job]
    progress: SweepProgress
    checkpoint_seconds: float
    standby: Standby | None = None  # worker processes started early, waiting for the release


@dataclass
class PoolOutcome:
    """What the workers of one run did."""

    worker_names: set[str] = field(default_factory=set)  # host:pid of every worker started
    interrupted: bool = False
    disk_full: str = ""  # the message, when a worker ran out of disk space


def run_workers(run: RunContext) -> PoolOutcome:
    """Run the workers (in this process when there is one); a `PoolOutcome`."""
    from kablate.train.loop import TrialInterrupted, warm_up

    catalog, study, roster, progress = run.catalog, run.study, run.roster, run.progress
    workers, threads = run.staffing
    procs: list = []
    outcome = PoolOutcome()

    def forward(signum: int) -> None:
        for proc in procs:
            if proc.is_alive():
                os.kill(proc.pid, signal.SIGINT)

    stop = StopFlag(forward if workers > 1 else None)
    stop.install()
    pulse = progress.pulse(lambda: study.get_trials(deepcopy=False))
    ticker = Steps(pulse, on_terminal=False).start()
    try:
        if workers == 1:
            ctx = WorkerContext(
                catalog,
                run.data,
                study,
                run.results_dir,
                threads,
                run.device,
                should_stop=stop,
                deadline=run.deadline,
                liveness=run.liveness,
                order=claim_order(run.jobs, run.estimates),
                estimates=run.estimates,
                checkpoint_seconds=run.checkpoint_seconds,
            )

            def on_finish(key: str, status: str) -> None:
                rows, _ = collect_trials(study, roster)
                progress.observe(study.get_trials(deepcopy=False))
                progress.update(n_finished(r["status"] for r in rows))
                progress.settle(rows)

            outcome.worker_names.add(ctx.worker_name)
            warm_up(catalog.sweep.recipe)
            with contextlib.suppress(TrialInterrupted):
                work(ctx, on_finish=on_finish)
        else:
            supervise(procs, stop, run, outcome)
    except DiskFullError as exc:
        log.error("%s", exc)
        outcome.disk_full = str(exc)
    except KeyboardInterrupt:
        log.warning("second stop request: stopping the workers now")
        for proc in procs:
            if proc.is_alive():
                proc.kill()
        stop.stopped = True
    finally:
        ticker.close()
        for proc in procs:
            proc.join()
        progress.close()
        signal.signal(signal.SIGINT, signal.default_int_handler)
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
    outcome.interrupted = stop.stopped and not outcome.disk_full
    return outcome


POLL_SECONDS = 2.0  # the supervisor's look at the study while no worker ends


def wait_for_exit(procs, timeout: float) -> list:
    """Block until one of ``procs`` ends, or ``timeout`` seconds pass; the ones that ended.

    It waits on the processes' sentinels, so the supervisor learns of an exit at once: the
    last worker's exit ends the sweep without waiting out a polling period.
    """
    running = {proc.sentinel: proc for proc in procs if proc.exitcode is None}
    ended = [running[sentinel] for sentinel in wait_any(list(running), timeout)]
    for proc in ended:
        proc.join()  # reaped: its exit code is known from here on
    return ended


def supervise(procs, stop: StopFlag, run: RunContext, outcome: PoolOutcome) -> None:
    """Release the workers standing by (or start them), follow their progress, and replace
    one that dies.

    A worker that ran out of disk space (exit code 4) stops the others: each puts its trial
    back in the queue, and `outcome.disk_full` says so.
    """
    study, roster, progress, workers = run.study, run.roster, run.progress, run.staffing.workers
    setup = WorkerSetup(
        str(run.sweep_path),
        str(run.results_root),
        run.url,
        run.staffing.threads,
        run.device,
        run.checkpoint_seconds,
    )
    release = Release(run.deadline, run.estimates)

    def follow(proc) -> None:
        procs.append(proc)
        outcome.worker_names.add(process_name(proc.pid))

    def start() -> None:
        # A stop asked for while it starts (SIGINT is ignored until it installs its handler)
        # is forwarded again below.
        follow(spawn(worker_main, setup, release))

    for proc in run.standby.release(release) if run.standby is not None else []:
        follow(proc)
    while len(procs) < workers:
        start()
    n_restarts = 0
    while any(p.is_alive() for p in procs):
        wait_for_exit(procs, POLL_SECONDS)
        if stop.stopped and stop.forward is not None:
            stop.forward(signal.SIGINT)  # reaches workers that were still starting (a no-op else)
        rows, _ = collect_trials(study, roster)
        finished = n_finished(r["status"] for r in rows)
        if finished != progress.n:
            progress.observe(study.get_trials(deepcopy=False))
            progress.update(finished)
        progress.settle(rows)
        for proc in [p for p in procs if not p.is_alive() and p.exitcode not in (0, EXIT_STOPPED)]:
            procs.remove(proc)
            proc.join()
            if proc.exitcode == EXIT_DISK_FULL and not outcome.disk_full:
                outcome.disk_full = str(DiskFullError(run.results_dir, "run.log names the file"))
                stop.stopped = True
                stop.forward(signal.SIGINT)
            if stop.stopped or n_restarts >= 2 * workers:
                continue
            # Its trial is recovered by the replacement (or another worker) before the next claim.
            log.warning(
                "worker %d ended with exit code %s; starting a new one", proc.pid, proc.exitcode
            )
            n_restarts += 1
            start()
