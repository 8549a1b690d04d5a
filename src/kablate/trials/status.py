"""Progress of a sweep, read from its storage: safe while a run is going, from anywhere.

Throughput is measured from the workers that are running now: each holds one trial, and a
trial takes about as long as the recent finished ones did (wall time from claim to tell, so
the slowdown of workers sharing a machine is included). That stays right across a resume,
when the study also holds trials from earlier nights. Once every trial has finished, the
throughput is that of the whole run: finished trials per hour of the time during which at
least one trial was running (the union of their claim-to-tell spans, so the gaps between
nights do not count).

A ``[search]`` sweep has no trials of its own while it searches: ``kablate run`` records the
sweep (``sweep.json``, ``plan.json``) only once the search has chosen its finalists, since
both describe them. Until then (``phase`` "search") the status is read from the search study
alone (`search_status`), found by the folder's name, which is the sweep's
(``results/<name>``), in the storage given, else the folder's journal.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import asdict, dataclass, field
from datetime import datetime
from pathlib import Path

from optuna.trial import FrozenTrial, TrialState

from kablate.errors import KablateError, UsageError
from kablate.lifecycle import (
    DIVERGED,
    DONE,
    FAILED,
    MISSING,
    RETIRED,
    RUNNING,
    STOPPED,
    WAITING,
    is_finished,
)
from kablate.results.folder import read_json
from kablate.results.paths import SEARCH_FILE, SWEEP_FILE
from kablate.trials.liveness import WORKER, process_alive, running_since
from kablate.trials.queue import trial_status
from kablate.trials.results import StoredResults, open_results
from kablate.trials.search_status import SearchStatus, search_line, search_status
from kablate.trials.store import STORAGE_ENV, open_storage, resolve_url, storage_exists

STATES = (DONE, RUNNING, WAITING, FAILED, DIVERGED, RETIRED, STOPPED)
RECENT = 20  # finished trials that set the expected trial time
SEARCH, TRIALS = "search", "trials"  # a status's phase: a [search] sweep searching; trials run


@dataclass
class SweepStatus:
    """A sweep's progress. In phase "search" the sweep's trials are not known yet: ``n_trials``,
    ``counts``, ``mean_trial_seconds``, ``throughput_per_hour``, ``eta_seconds``, ``staffing``
    and ``standing`` are None, ``variants`` and ``running`` empty, and ``search`` says how far
    the search is."""

    sweep: str
    n_trials: int | None
    counts: dict[str, int] | None
    variants: list[dict]  # per variant: name, n_trials and a count per state
    running: list[dict]  # job, variant, seed, worker, alive, started (ISO time), seconds
    mean_trial_seconds: float | None  # recent finished trials, claim to tell
    # trials per hour at the current number of running workers; once finished, over the run span
    throughput_per_hour: float | None
    eta_seconds: float | None  # None: nothing is running, so no end can be predicted
    finished: bool = False
    staffing: dict | None = field(default_factory=dict)
    # how the variants stand (`analysis.standing.Standing`), or None with the reason
    standing: dict | None = None
    standing_error: str | None = None
    search: dict | None = None  # a [search] sweep's search (`search_status.SearchStatus`)
    phase: str = TRIALS  # SEARCH: a [search] sweep whose finalists are not recorded yet
    finalists: list[str] | None = None  # their names once the search chose them (search.json)

    def to_dict(self) -> dict:
        return asdict(self)


def row_state(status: str) -> str:
    return WAITING if status == MISSING else status


def summarize(
    name: str, rows: list[dict], trials: list[FrozenTrial], now: datetime, staffing: dict
) -> SweepStatus:
    """Counts, per-variant progress, throughput and ETA.

    Args:
        rows: trials.csv-style rows, one per (variant, seed) of the sweep.
        trials: the study's trials (for their claim and finish times).
        now: the current local time, naive like Optuna's datetimes.
    """
    counts = Counter(row_state(r["status"]) for r in rows)
    variants: dict[str, dict] = {}
    for row in rows:
        entry = variants.setdefault(
            row["variant"], {"variant": row["variant"], "n_trials": 0, **dict.fromkeys(STATES, 0)}
        )
        entry["n_trials"] += 1
        entry[row_state(row["status"])] += 1
        if row["status"] == RETIRED and row.get("retired_why") == STOPPED:
            entry["halted_after"] = row.get("retired_after")  # halving stopped the variant
    tagged = [t for t in trials if t.user_attrs.get("job")]
    finished = [t for t in tagged if is_finished(trial_status(t))]
    finished.sort(key=lambda t: t.datetime_complete)
    # Only trials trained to the end say how long one takes: a stopped or diverged one ended
    # early (it counts at its actual time in the run's span below).
    durations = [
        (t.datetime_complete - t.datetime_start).total_seconds()
        for t in [t for t in finished if trial_status(t) == DONE][-RECENT:]
        if t.datetime_start and t.datetime_complete
    ]
    running = sorted((t for t in tagged if t.state == TrialState.RUNNING), key=lambda t: t.number)
    alive = [
        process_alive(t.user_attrs[WORKER]) if WORKER in t.user_attrs else None for t in running
    ]
    # A trial whose process has ended trains no more: it counts neither in the throughput nor
    # in the workers the ETA divides by (the next claim, or the next `kablate run`, recovers it).
    live = [t for t, up in zip(running, alive, strict=True) if up is not False]
    mean = sum(durations) / len(durations) if durations else None
    left = counts["waiting"] + counts["running"]
    throughput, eta = 0.0, None
    if mean and live:
        throughput = len(live) / mean * 3600
        eta = left * mean / len(live)
    elif not left:
        eta = 0.0
        span = busy_seconds(finished)
        throughput = len(finished) / span * 3600 if span else 0.0
    return SweepStatus(
        sweep=name,
        n_trials=len(rows),
        counts={s: counts.get(s, 0) for s in STATES},
        variants=list(variants.values()),
        running=[
            {
                "job": t.user_attrs["job"],
                "variant": t.user_attrs.get("variant", t.user_attrs["job"]),
                "seed": t.user_attrs.get("seed"),
                "worker": t.user_attrs.get(WORKER),
                "alive": up,  # true, false, or null (on another machine, or no worker recorded)
                **running_since(t, now),
            }
            for t, up in zip(running, alive, strict=True)
        ],
        mean_trial_seconds=round(mean, 3) if mean else None,
        throughput_per_hour=round(throughput, 2),
        eta_seconds=round(eta, 1) if eta is not None else None,
        finished=not left,
        staffing=staffing,
    )


def busy_seconds(trials: list[FrozenTrial]) -> float:
    """Seconds during which at least one of ``trials`` was running (claim to tell)."""
    spans = sorted(
        (t.datetime_start, t.datetime_complete)
        for t in trials
        if t.datetime_start and t.datetime_complete
    )
    total, end = 0.0, None
    for start, stop in spans:
        if end is None or start > end:
            total += (stop - start).total_seconds()
            end = stop
        elif stop > end:
            total += (stop - end).total_seconds()
            end = stop
    return total


def format_status(status: SweepStatus) -> str:
    if status.phase == SEARCH:
        return format_searching(status)
    c = status.counts
    n_halted = sum(v[RETIRED] for v in status.variants if v.get("halted_after") is not None)
    n_raced = c[RETIRED] - n_halted
    n_live = sum(e.get("alive") is not False for e in status.running)  # processes still running
    lines = [
        *search_line(SearchStatus(**status.search) if status.search else None),
        f"sweep {status.sweep}: {c['done']}/{status.n_trials} done, {c['running']} running, "
        f"{c['waiting']} waiting, {c['failed']} failed, {c['diverged']} diverged"
        + (f", {n_raced} not run (variant retired by racing)" if n_raced else "")
        + (f", {c[STOPPED]} stopped early (successive halving)" if c[STOPPED] else "")
        + (f", {n_halted} not run (variant stopped by halving)" if n_halted else ""),
    ]
    if status.finished and status.throughput_per_hour:
        lines.append(
            f"every trial has finished; throughput {status.throughput_per_hour:.1f} trials/h "
            "over the time trials were running"
        )
    elif status.finished:
        lines.append("every trial has finished")
    elif status.throughput_per_hour:
        lines.append(
            f"throughput {status.throughput_per_hour:.1f} trials/h with {n_live} "
            f"running (a trial takes ~{status.mean_trial_seconds:.0f}s)   "
            f"ETA {duration(status.eta_seconds)}"
        )
    elif not n_live:
        lines.append("no trial is running: rerun the sweep's `kablate run` command to continue")
    for entry in status.running:
        seed = f" seed {entry['seed']}" if entry.get("seed") is not None else ""
        gone = ""
        if entry.get("alive") is False:
            gone = " (its process has ended: the next claim or run resumes it from its checkpoint)"
        lines.append(
            f"  running {entry['variant']}{seed} on {entry['worker'] or '?'} for "
            f"{duration(entry['seconds'] or 0)}{gone}"
        )
    width = max((len(v["variant"]) for v in status.variants), default=8)
    cells = [f"[{progress_bar(v)}]  {v['done']}/{v['n_trials']}" for v in status.variants]
    cell_width = max(map(len, cells), default=0)
    accuracy = {v["variant"]: v for v in (status.standing or {}).get("variants", [])}
    lines.append("")
    for entry, cell in zip(status.variants, cells, strict=True):
        acc = accuracy_text(accuracy.get(entry["variant"]))
        if entry[STOPPED] and not acc:  # its early scores are not compared (analysis/halving.py)
            acc = "  stopped early by successive halving: not compared"
        if entry.get("halted_after") is not None:
            acc += f"; not run: {entry[RETIRED]} seed(s), variant stopped by halving after seed "
            acc += str(entry["halted_after"])
        lines.append(f"  {entry['variant']:<{width}}  {cell:<{cell_width}}{acc}".rstrip())
    lines.append("")
    lines.append(
        "  # done  ~ running  x failed or diverged  . waiting  - not run (variant retired by "
        "racing or stopped by halving)  / stopped early (halving)"
    )
    lines += standing_lines(status)
    return "\n".join(lines)


def format_searching(status: SweepStatus) -> str:
    """The status of a [search] sweep whose finalists are not recorded yet."""
    found = SearchStatus(**status.search)
    if status.finalists is None:
        state = (
            "searching; the finalists (the front the search ends with, and the baseline) are not "
            "chosen yet, so none of their trials is queued"
        )
    else:
        state = (
            f"the search has ended with {len(status.finalists)} finalist(s) ({SEARCH_FILE}); "
            "`kablate run` is preparing their trials"
        )
    lines = [*search_line(found), f"sweep {status.sweep}: {state}"]
    for entry in found.training:
        gone = ""
        if entry["alive"] is False:
            gone = " (its process has ended: the next `kablate run` frees its slot)"
        lines.append(
            f"  training {entry['plan']} on {entry['worker'] or '?'} for "
            f"{duration(entry['seconds'] or 0)}{gone}"
        )
    alive = [e for e in found.training if e["alive"] is not False]
    if status.finalists is None and not alive:
        lines.append("no plan is training: rerun the sweep's `kablate run` command to continue")
    return "\n".join(lines)


def progress_bar(entry: dict) -> str:
    """One character per trial of a variant: '#' done, '~' running, 'x' failed or diverged,
    '.' waiting, '-' not run because racing retired the variant or halving stopped it on another
    seed, '/' stopped early by successive halving."""
    return (
        "#" * entry["done"]
        + "~" * entry["running"]
        + "x" * (entry["failed"] + entry["diverged"])
        + "." * entry["waiting"]
        + "-" * entry[RETIRED]
        + "/" * entry[STOPPED]
    )


def accuracy_text(entry: dict | None) -> str:
    """'  val acc 91.00% [88.10, 93.40] on 2 seeds', or '' before a variant has a result."""
    if not entry or entry["val_acc_mean"] is None:
        return ""
    low, high = entry["val_acc_ci_low"], entry["val_acc_ci_high"]
    interval = f" [{100 * low:.2f}, {100 * high:.2f}]" if low is not None else ""
    return f"  val acc {100 * entry['val_acc_mean']:.2f}%{interval} on {entry['n_seeds']} seed(s)"


def standing_lines(status: SweepStatus) -> list[str]:
    """The leader under the sweep's rule, marked provisional while trials lack a result."""
    standing = status.standing
    if standing is None:
        return ["", f"how the variants stand is unknown: {status.standing_error}"]
    basis = {
        "predictions": "accuracy over every compared (seed, validation image) pair, with its 95% "
        "interval (two-level bootstrap)",
        "seeds": "mean of the seeds' accuracies, with its 95% t interval (none from one seed)",
    }
    lines = ["", f"val acc: {basis[standing['accuracy_from']]}"]
    if standing["seeds"] is not None:
        seeds = ", ".join(map(str, standing["seeds"]))
        lines.append(f"compared on seed(s) {seeds}, which every variant with a result has finished")
    if standing["leader"] is None:
        return [*lines, standing["note"]]
    if standing["provisional"]:
        label = f"provisional leader ({standing['n_missing']} trial(s) have no result yet)"
    else:
        label = "leader (every trial has a result; `kablate report` explains the pick)"
    share, shown = standing["stability"], ""
    if share is not None:
        how = "of bootstrap resamples" if standing["rule"] == "margin" else "leaving one seed out"
        shown = f", the rule's pick in {100 * share:.0f}% {how}"
    lines.append(f"{label}: {standing['leader']}{shown}")
    lines.append(f"  rule {standing['rule']}: {standing['note']}")
    return lines


def duration(seconds: float | None) -> str:
    """'1h05m', '3m20s', '12s'."""
    seconds = int(round(seconds or 0))
    h, rem = divmod(seconds, 3600)
    m, s = divmod(rem, 60)
    if h:
        return f"{h}h{m:02d}m"
    return f"{m}m{s:02d}s" if m else f"{s}s"


def read_status(folder: StoredResults) -> SweepStatus:
    """The status of a `ResultsFolder`, read from its storage now, with how its variants
    stand (or why that cannot be told: the progress is shown either way)."""
    # Imported here: the workers import this module for `summarize`, and the analysis (pandas,
    # statsmodels) would slow every worker's start and import the trials package in a circle.
    from kablate.analysis.standing import stand
    from kablate.analysis.summary import pick_settings

    rows, curves = folder.rows()
    trials = folder.study.get_trials(deepcopy=False)
    staffing = {k: folder.meta.get(k) for k in ("workers", "threads")}
    status = summarize(folder.name, rows, trials, datetime.now(), staffing)
    found = search_status(folder.study._storage, folder.name)  # noqa: SLF001
    status.search = found.to_dict() if found else None
    status.finalists = finalist_names(folder.search())
    try:
        data = folder.data()
        pick = pick_settings(folder.meta)
        grids = folder.meta.get("grids", [])
        status.standing = asdict(stand(rows, curves, folder.plan, grids, data, pick))
    except KablateError as exc:
        status.standing_error = str(exc)
    return status


def folder_status(path: Path, storage: str | None = None) -> SweepStatus:
    """The status of the results folder ``path``: `read_status` once ``kablate run`` has
    recorded the sweep, else that of the search of a [search] sweep still in its search phase.

    Raises:
        UsageError: not a results folder, or one whose storage cannot be found or opened.
    """
    if not (path / SWEEP_FILE).is_file() and path.is_dir():
        searching = search_phase(path, storage)
        if searching is not None:
            return searching
    return read_status(open_results(path, storage))


def search_phase(path: Path, storage: str | None) -> SweepStatus | None:
    """The status of the search stored for the folder ``path`` (sweep name: the folder's),
    with no sweep record yet; None when no search study is found there.

    Raises:
        UsageError: ``path`` holds no storage and none is given (a search on a server storage
            is found only through --storage or $KABLATE_STORAGE until it records the sweep).
    """
    url = resolve_url(storage)
    if not storage_exists(path, url):
        raise UsageError(
            f"{path / SWEEP_FILE} is missing: is {path} a kablate results folder? (A [search] "
            "sweep on a server storage writes it once its search ends; until then give that "
            f"storage with --storage or ${STORAGE_ENV} to see the search.)"
        )
    found = search_status(open_storage(path, url, read_only=True), path.name)
    if found is None:
        return None
    search_file = path / SEARCH_FILE
    record = read_json(search_file) if search_file.is_file() else None  # the search has ended
    return SweepStatus(
        sweep=path.name,
        n_trials=None,
        counts=None,
        variants=[],
        running=[],
        mean_trial_seconds=None,
        throughput_per_hour=None,
        eta_seconds=None,
        staffing=None,
        standing_error="the sweep's trials are not known until the search chooses its finalists",
        search=found.to_dict(),
        phase=SEARCH,
        finalists=finalist_names(record),
    )


def finalist_names(record: dict | None) -> list[str] | None:
    """The finalists' names in a search record (``search.json``); None without one."""
    return [f["name"] for f in record["finalists"]] if record else None
