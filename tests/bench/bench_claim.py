"""Benchmark: the claim load test behind the choice of the default storage.

200 tagged trials are enqueued, then 4 processes claim and finish them as fast as they can
(no training), with Optuna's own ``ask()`` and with kablate's ``claim_next``, on RDB-on-SQLite
and on the journal file. Printed per case: trials handed out twice, jobs never finished,
untagged trials that ``ask()`` invented, errors, and the time taken.
Run: python tests/bench/bench_claim.py [n_trials] [n_processes]
"""

from __future__ import annotations

import multiprocessing as mp
import sys
import tempfile
import time
import traceback
from collections import Counter
from pathlib import Path

from optuna.trial import TrialState

from kablate.trials.jobs import Job
from kablate.trials.liveness import liveness_for
from kablate.trials.queue import claim_next, enqueue_missing, has_waiting
from kablate.trials.store import lock_dir, open_study


def worker(how: str, folder: str, url: str | None, out: str, go) -> None:
    study = open_study("claims", Path(folder), url)
    liveness = liveness_for(study, lock_dir(Path(folder), url))
    go.wait()
    claimed, errors = [], 0
    while True:
        try:
            if how == "ask":
                if not has_waiting(study):
                    break
                trial = study.ask()
                claimed.append(trial.user_attrs.get("job", "-"))
                study.tell(trial, values=[0.5, 1.0])
            else:
                claim = claim_next(study, liveness)
                if claim is None:
                    break
                claimed.append(claim.key)
                study.tell(claim.trial, values=[0.5, 1.0])
                liveness.release(claim.token)
        except Exception:
            errors += 1
            traceback.print_exc(limit=1)
            if errors > 20:
                break
    Path(out).write_text("\n".join(claimed) + f"\n#errors {errors}\n")


def case(how: str, backend: str, n_trials: int, n_procs: int) -> str:
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        url = f"sqlite:///{folder / 'study.db'}" if backend == "sqlite" else None
        study = open_study("claims", folder, url)
        enqueue_missing(study, [Job(f"v{i:04d}", f"p{i}", 0) for i in range(n_trials)])
        ctx = mp.get_context("spawn")
        go = ctx.Event()
        outs = [folder / f"out{i}.txt" for i in range(n_procs)]
        procs = [ctx.Process(target=worker, args=(how, str(folder), url, str(o), go)) for o in outs]
        for p in procs:
            p.start()
        time.sleep(3.0)  # let every process import and open the study
        start = time.perf_counter()
        go.set()
        for p in procs:
            p.join()
        seconds = time.perf_counter() - start
        lines = [ln for o in outs for ln in o.read_text().split("\n") if ln]
        errors = sum(int(ln.split()[1]) for ln in lines if ln.startswith("#errors"))
        keys = Counter(ln for ln in lines if not ln.startswith("#"))
        twice = sum(n - 1 for k, n in keys.items() if k != "-" and n > 1)
        invented = keys.get("-", 0)
        finished = {
            t.user_attrs.get("job")
            for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))
        }
        lost = n_trials - len(finished - {None})
    return (
        f"{backend:<8} {how:<11} twice {twice:>3}  lost {lost:>3}  invented {invented:>3}  "
        f"errors {errors:>3}  {seconds:6.1f}s"
    )


def main() -> None:
    n_trials = int(sys.argv[1]) if len(sys.argv) > 1 else 200
    n_procs = int(sys.argv[2]) if len(sys.argv) > 2 else 4
    print(f"{n_trials} enqueued trials, {n_procs} processes")
    for backend in ("sqlite", "journal"):
        for how in ("ask", "claim_next"):
            print(case(how, backend, n_trials, n_procs), flush=True)


if __name__ == "__main__":
    main()
