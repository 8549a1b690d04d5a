"""Benchmark: the sweep runner on the quickstart sweep, measured side by side in one run.

Targets (issue: the sweep runner):
- runner overhead per trial (claiming, storage writes, artifacts) ≤ 1% of trial time: a
  worker's busy span (first claim to last tell) minus its trials' own time (``trial_seconds``,
  the whole `train_trial` call: model, epochs, test), over the trials' time;
- 2 workers × 1 thread give ≥ 1.3× the sweep throughput of 1 worker × 2 threads;
- the budget estimate (``--dry-run``) is within ±20% of the actual time of the command (the
  estimate counts start-up and calibration, as a budget does).

The sweep time is the span from the first claim to the last tell, read from the study; the
process start-up (imports, data) is reported beside it. The machine is shared, so run it when
it is quiet and read the figures with that in mind.
Run: python tests/bench/bench_runner.py [sweeps/quickstart.toml]
"""

from __future__ import annotations

import re
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

from optuna.trial import TrialState

from kablate.spec import load_sweep
from kablate.trials.store import open_study

REPO = Path(__file__).resolve().parents[2]


def kablate(*args: str) -> tuple[float, str]:
    start = time.perf_counter()
    out = subprocess.run(
        [sys.executable, "-m", "kablate", *args], cwd=REPO, capture_output=True, text=True
    )
    if out.returncode != 0:
        raise SystemExit(out.stderr)
    return time.perf_counter() - start, out.stdout


def seconds_of(text: str) -> float:
    """'1h02m' / '3m20s' / '45s' → seconds."""
    m = re.fullmatch(r"(?:(\d+)h)?(?:(\d+)m)?(?:(\d+)s)?", text)
    h, mi, s = (int(g) if g else 0 for g in m.groups())
    return h * 3600 + mi * 60 + s


def measure(sweep: Path, workers: int, threads: int, root: Path) -> dict:
    wall, _ = kablate(
        "run", str(sweep), "--workers", str(workers), "--threads", str(threads),
        "--results", str(root), "--no-report",
    )  # fmt: skip
    name = load_sweep(sweep).name
    trials = open_study(name, root / name, None, create=False).get_trials()
    done = [t for t in trials if t.state == TrialState.COMPLETE]
    span = max(t.datetime_complete for t in done) - min(t.datetime_start for t in done)
    by_worker = defaultdict(list)
    for t in done:
        by_worker[t.user_attrs["worker"]].append(t)
    busy = sum(
        (max(t.datetime_complete for t in ts) - min(t.datetime_start for t in ts)).total_seconds()
        for ts in by_worker.values()
    )
    trial = sum(t.user_attrs["trial_seconds"] for t in done)  # the worker's train_trial calls
    train = sum(t.user_attrs["train_seconds"] for t in done)  # their epochs only
    return {
        "wall": wall,
        "span": span.total_seconds(),
        "n": len(done),
        "overhead": (busy - trial) / trial,
        "outside_epochs": (busy - train) / train,
        "trial": trial / len(done),
    }


def main() -> None:
    sweep = Path(sys.argv[1] if len(sys.argv) > 1 else "sweeps/quickstart.toml")
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        _, text = kablate(
            "run", str(sweep), "--workers", "2", "--threads", "1", "--dry-run",
            "--results", str(root / "dry"),
        )  # fmt: skip
        predicted = seconds_of(re.search(r"take about (\S+) on", text).group(1))
        two = measure(sweep, 2, 1, root / "2x1")
        one = measure(sweep, 1, 2, root / "1x2")
    print(f"quickstart sweep: {two['n']} trials, mean trial {two['trial']:.2f}s (2x1)")
    print(
        f"runner overhead per trial (worker busy time - trial time) / trial time: "
        f"2x1 {two['overhead']:.2%}, 1x2 {one['overhead']:.2%}   (target <= 1%)"
    )
    print(
        f"  the same, also counting model build and test evaluation as overhead: "
        f"2x1 {two['outside_epochs']:.2%}, 1x2 {one['outside_epochs']:.2%}"
    )
    ratio = one["span"] / two["span"]
    print(
        f"sweep time 2x1 {two['span']:.1f}s vs 1x2 {one['span']:.1f}s: 2x1 throughput "
        f"{ratio:.2f}x   (target >= 1.3x); whole command {two['wall']:.1f}s vs {one['wall']:.1f}s"
    )
    print(
        f"budget estimate {predicted:.0f}s vs the actual 2x1 command {two['wall']:.1f}s "
        f"(the estimate includes start-up and calibration): "
        f"{predicted / two['wall'] - 1:+.1%}   (target within +-20%)"
    )


if __name__ == "__main__":
    main()
