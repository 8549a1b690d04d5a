"""`kablate run` on a ``[search]`` sweep: search the space, then train the finalists.

A sweep with a ``[search]`` table runs in two phases:

1. search (`run_search`): NSGA-II (`kablate.trials.search.search_front`) trains ``budget``
   plans of the space with the sweep's first seed and recipe, in this process and
   ``--workers`` − 1 worker processes (and in any other `kablate run` of the sweep on a shared
   PostgreSQL storage). Its trials live in a second Optuna study, ``<sweep name>.search``, in
   the sweep's own storage (the journal file, or ``--storage``), which keeps the budget
   (`kablate.trials.search_claim`), so that rerunning the command continues it: evaluated
   plans are never trained again, and a plan a kill cut short may be proposed again. Only
   ``--workers 1`` on one machine proposes the same plans from the same sampler seed.
2. finalists: the plans on the front it found, the baseline and the sweep's explicit
   ``[[plan]]`` tables become explicit plans (`finalist_sweep`), recorded in ``search.json``,
   and the normal runner trains them with every seed (racing unchanged). So the report's
   decision rule applies to them as to any sweep's plans.

A finalist is named as a grid cell is (`kablate.plans.expand.cell_name`), as the search's
start plans already are. The workers read the finalists from ``search.json`` too.
"""

from __future__ import annotations

import dataclasses
import logging
import multiprocessing as mp
from pathlib import Path

from kablate.console import step
from kablate.costs.catalog import build_catalog
from kablate.costs.screen import SpaceScreen
from kablate.data.prepare import prepare_data
from kablate.errors import UsageError
from kablate.nets.layout import layout_network
from kablate.plans.expand import Variant, cell_name
from kablate.plans.groups import resolve_kernels
from kablate.plans.space import start_plans
from kablate.results.folder import read_json
from kablate.results.paths import SEARCH_FILE
from kablate.results.write import write_json
from kablate.spec.loader import load_sweep
from kablate.spec.schema import SweepSpec
from kablate.spec.search import finalist_sweep
from kablate.train.loop import train_trial
from kablate.trials.liveness import liveness_for
from kablate.trials.search import (
    SearchResult,
    default_population,
    read_result,
    search_front,
    search_study,
)
from kablate.trials.store import is_local, lock_dir, open_storage

log = logging.getLogger("kablate")

SEARCH_SUFFIX = ".search"  # the search study's name is the sweep's with this suffix
SEARCH_LOCKS = "search"  # the search trials' locks, in the locks folder (local storages)


def search_study_name(sweep_name: str) -> str:
    """The name of a sweep's search study, beside its own study in the same storage."""
    return sweep_name + SEARCH_SUFFIX


def run_search(
    catalog,
    data,
    results_dir: Path,
    url: str | None,
    staffing: tuple[int, int],
    device: str,
    sweep_path: Path,
    results_root: Path,
) -> SweepSpec:
    """Run (or continue) the search of a costed ``[search]`` sweep (`Catalog`) on ``staffing``
    (workers × threads): this process and ``workers − 1`` worker processes share the study.
    Write ``search.json`` and return the sweep of its finalists (`finalist_sweep`).

    Raises:
        KablateError: a worker process failed and the search did not reach its end.
    """
    sweep = catalog.sweep
    search = sweep.search
    workers, threads = staffing
    step(
        "search",
        f"NSGA-II over the [search] space: {search.budget} plans with seed {sweep.seeds[0]}, "
        f"on {workers} worker(s)",
    )
    ctx = mp.get_context("spawn")
    args = (str(sweep_path), str(results_root), url, threads, device)
    procs = [ctx.Process(target=_search_worker_main, args=args) for _ in range(workers - 1)]
    for proc in procs:
        proc.start()
    # One process on one machine proposes from the sampler seed; several need seeds of their own.
    seed = search.seed if workers == 1 and is_local(url) else None
    try:
        result = search_in(catalog, data, results_dir, url, threads, device, seed)
    finally:
        for proc in procs:
            proc.join()
    failed = [p.exitcode for p in procs if p.exitcode != 0]
    if failed:  # its trial was recovered by this process's loop; say so, and go on
        log.warning("search: %d worker process(es) ended with exit codes %s", len(failed), failed)
    log.info(
        "search: %d plans trained of %d proposed; %d on the front",
        len(result.evaluated),
        len(result.candidates),
        len(result.front),
    )
    record = search_record(result, catalog)
    write_json(results_dir / SEARCH_FILE, record)
    return finalist_sweep(sweep, record)


def search_in(
    catalog, data, results_dir: Path, url: str | None, threads: int, device: str, seed: int | None
):
    """Take part in the search of the sweep's study from this process, its sampler seeded by
    ``seed``, until the search is done; the `SearchResult` of the whole study (every process's
    proposals)."""
    sweep = catalog.sweep
    search = sweep.search
    study = search_study(
        seed,
        default_population(search.budget),
        storage=open_storage(results_dir, url),
        study_name=search_study_name(sweep.name),
        load_if_exists=True,
    )
    liveness = liveness_for(study, lock_dir(results_dir, url) / SEARCH_LOCKS)

    def score(plan: dict[str, str]) -> float:
        variant = Variant(cell_name(plan), plan, resolve_kernels(sweep.network, plan))
        layout = layout_network(sweep.network, variant, catalog.in_shape, catalog.n_classes)
        step("search", f"training {variant.name} with seed {sweep.seeds[0]}")
        record = train_trial(
            layout, sweep.recipe, data, seed=sweep.seeds[0], threads=threads, device=device
        )
        return record.val_acc

    search_front(
        search.choices,
        SpaceScreen.of(catalog),
        score,
        search.budget,
        seed,
        study=study,
        first=start_plans(search.choices),
        liveness=liveness,
    )
    return read_result(study, search.choices, search.budget)


def _search_worker_main(
    sweep_path: str, results_root: str, url: str | None, threads: int, device: str
) -> None:
    """Entry point of a search worker process: the sweep, its data, then `search_in`."""
    from kablate.trials.pool import setup_logging  # pool imports this module

    sweep = load_sweep(Path(sweep_path))
    results_dir = Path(results_root) / sweep.name
    setup_logging(results_dir, to_console=False)
    catalog = build_catalog(sweep)
    search_in(catalog, prepare_data(sweep.data), results_dir, url, threads, device, None)


def search_record(result: SearchResult, catalog) -> dict:
    """What ``search.json`` holds: the search's settings, every proposal in order, and the
    finalists (front, then the baseline unless it is on the front)."""
    sweep = catalog.sweep
    baseline = catalog.baseline.variant
    finalists = [{"name": cell_name(c.plan), "plan": c.plan} for c in result.front]
    if not any(f["plan"] == baseline.plan for f in finalists):
        finalists.append({"name": baseline.name, "plan": baseline.plan})
    return {
        "study": search_study_name(sweep.name),
        "method": "NSGA-II (Deb et al. 2002), optuna.samplers.NSGAIISampler",
        "sampler_seed": sweep.search.seed,
        "training_seed": sweep.seeds[0],
        "budget": result.budget,
        "cost": sweep.search.cost,
        "n_space": result.n_space,
        "baseline": baseline.name,
        "candidates": [
            dict(dataclasses.asdict(c), name=cell_name(c.plan)) for c in result.candidates
        ],
        "finalists": finalists,
    }


def recorded_finalists(sweep: SweepSpec, results_dir: Path) -> SweepSpec:
    """A worker's sweep: for a ``[search]`` sweep, the finalists ``kablate run`` recorded in
    ``search.json``; any other sweep as it is.

    Raises:
        UsageError: a ``[search]`` sweep whose ``search.json`` is missing or damaged.
    """
    if sweep.search is None:
        return sweep
    path = results_dir / SEARCH_FILE
    if not path.is_file():
        raise UsageError(f"{path} is missing: `kablate run` searches the space before training")
    return finalist_sweep(sweep, read_json(path))
