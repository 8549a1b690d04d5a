"""Load test: many tiny trials through the real command line, on each storage.

- 500 trials × 2 worker processes on the default journal file;
- 200 trials × 4 worker processes on a throwaway PostgreSQL cluster (as in the tests:
  tests/trials/conftest.py, the ``postgres`` user, 127.0.0.1 only).

Each trial trains a tiny network for one step on 64 digits, so that the queue, the storage and
the workers are what is measured. Printed per case: the exit code, jobs completed exactly once,
jobs completed twice or never, failed trials, lock or storage errors in the output and in
run.log, and the wall time with trials per second.
Run: python tests/bench/bench_load.py [n_journal] [n_postgres]

Measured once on the shared 2-core development machine (other work running):
  journal    500 trials x 2 workers: exit 0, done once 500, twice 0, never 0, failed 0,
             lock/storage errors 0, 32 s (15.5 trials/s)
  postgres   200 trials x 4 workers: exit 0, done once 200, twice 0, never 0, failed 0,
             lock/storage errors 0, 95 s (2.1 trials/s)
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import tempfile
import textwrap
import time
from collections import Counter
from pathlib import Path

from optuna.trial import TrialState
from tests.conftest import write_sweep
from tests.trials.conftest import create_database, throwaway_postgres

from kablate.trials.store import open_study

PLANS = ("3", "5", "7", "3:depthwise")
TROUBLE = re.compile(r"(?i)\block|traceback|deadlock|could not|operationalerror|integrityerror")


def load_sweep_file(folder: Path, n_trials: int) -> tuple[Path, int]:
    """A sweep of about ``n_trials`` tiny trials; (its path, its number of trials)."""
    seeds = list(range(-(-n_trials // len(PLANS))))
    plans = "\n".join(
        f'[[plan]]\nname = "body-{i}"\nbody = "{kernel}"\n' for i, kernel in enumerate(PLANS)
    )
    body = textwrap.dedent(f"""
        [sweep]
        name = "load"
        seeds = {seeds}

        [data]
        source = "digits"
        train_size = 64
        val_size = 32
        test_size = 32

        [network]
        from = "configs/tiny-net.toml"

        [recipe]
        from = "configs/tiny-recipe.toml"
        epochs = 1
        max_steps = 1
    """)
    return write_sweep(folder, body + "\n" + plans, name="load"), len(seeds) * len(PLANS)


def case(label: str, n_trials: int, workers: int, url: str | None, env: dict) -> str:
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        sweep, n_jobs = load_sweep_file(folder, n_trials)
        cmd = [sys.executable, "-m", "kablate", "run", str(sweep), "--workers", str(workers)]
        cmd += ["--results", str(folder / "results"), "--no-report"]
        if url:
            cmd += ["--storage", url]
        start = time.perf_counter()
        done = subprocess.run(cmd, capture_output=True, text=True, env=env)
        seconds = time.perf_counter() - start
        study = open_study("load", folder / "results" / "load", url, create=False)
        trials = study.get_trials(deepcopy=False)
        completed = Counter(
            t.user_attrs.get("job") for t in trials if t.state == TrialState.COMPLETE
        )
        failed = Counter(
            t.user_attrs.get("outcome", "?") for t in trials if t.state == TrialState.FAIL
        )
        log = (folder / "results" / "load" / "run.log").read_text()
        trouble = [ln for ln in (done.stderr + log).splitlines() if TROUBLE.search(ln)]
        for line in trouble[:5]:
            print("   ", line)
    once = sum(1 for n in completed.values() if n == 1)
    twice = sum(1 for n in completed.values() if n > 1)
    return (
        f"{label:<10} {n_jobs} trials x {workers} workers: exit {done.returncode}, "
        f"done once {once}, twice {twice}, never {n_jobs - once - twice}, "
        f"failed trials {dict(failed) or 0}, lock/storage errors {len(trouble)}, "
        f"{seconds:.0f}s ({n_jobs / seconds:.1f} trials/s)"
    )


def main() -> None:
    n_journal = int(sys.argv[1]) if len(sys.argv) > 1 else 500
    n_postgres = int(sys.argv[2]) if len(sys.argv) > 2 else 200
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(sys.path))
    print(case("journal", n_journal, 2, None, env), flush=True)
    with throwaway_postgres() as (host_url, password):
        url = create_database(host_url, password)
        os.environ["PGPASSWORD"] = password  # for this process's own reads
        print(case("postgres", n_postgres, 4, url, dict(env, PGPASSWORD=password)), flush=True)


if __name__ == "__main__":
    main()
