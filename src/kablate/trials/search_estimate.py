"""`kablate run --dry-run` on a ``[search]`` sweep: what the search and its finalists will take.

Which plans the search trains is not known before it runs, so the estimate times the plans it
starts from (`kablate.plans.space.start_plans`: every group at one spec) with the calibration
every dry run uses (`kablate.trials.budget.calibrate`), and gives:

- the search: ``budget`` trials of one seed, shared by the workers, between the fastest and
  the slowest start plan's time;
- the finalists: an upper bound, since the front found is not known yet: at most ``budget``
  plans on it, plus the baseline and the sweep's ``[[plan]]`` tables, each with every seed, at
  the slowest start plan's time.

The slowest start plan is the one of the largest kernels everywhere, which is usually the
slowest plan of the space; a mixed plan with a slower spec in some group than any uniform plan
has is not bounded by it (the estimate says so).
"""

from __future__ import annotations

import math

from kablate.costs.catalog import Catalog, build_catalog
from kablate.plans.expand import cell_name
from kablate.plans.space import start_plans
from kablate.spec.search import finalist_sweep
from kablate.trials.budget import calibrate
from kablate.trials.status import duration


def search_estimate(catalog: Catalog, data, staffing: tuple[int, int]) -> str:
    """The printed estimate for a costed ``[search]`` sweep on ``staffing`` (workers × threads)."""
    sweep = catalog.sweep
    search = sweep.search
    starts = [{"name": cell_name(p), "plan": p} for p in start_plans(search.choices)]
    record = {"finalists": starts, "baseline": catalog.baseline.variant.name}
    probe = build_catalog(finalist_sweep(sweep, record))
    seconds = [c.trial_seconds for c in calibrate(probe, data, staffing.threads).values()]
    workers = staffing.workers
    rounds = math.ceil(search.budget / workers)  # trials one worker trains at most
    low, high = search.budget * min(seconds) / workers, rounds * max(seconds)
    n_finalists = search.budget + 1 + len(sweep.plans)  # front ≤ budget, baseline, [[plan]]
    n_trials = n_finalists * len(sweep.seeds)
    bound = math.ceil(n_trials / workers) * max(seconds)
    return (
        f"search: {search.budget} plans at {min(seconds):.1f}–{max(seconds):.1f} s per trial "
        f"(timed on the {len(probe.variants)} start plan(s)), seed {sweep.seeds[0]}, on "
        f"{workers} worker(s): about {duration(low)} to {duration(high)}\n"
        f"finalists: at most {n_finalists} plans (the front found, at most the budget; the "
        f"baseline; {len(sweep.plans)} [[plan]]) × {len(sweep.seeds)} seeds = {n_trials} "
        f"trials: at most about {duration(bound)}\n"
        f"in all, at most about {duration(high + bound)} (from timing a few training steps of "
        "each start plan on this machine; a mixed plan slower than every start plan would take "
        "longer)"
    )
