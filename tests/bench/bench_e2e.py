"""Benchmark: `kablate run` on the quickstart end to end, against a plain hand-written loop.

Target (issue "No idle cores, no waiting"): `kablate run sweeps/quickstart.toml` (15 trials on
digits, default workers and threads, no report) at least 2.0x faster than a plain loop over
the same 15 trials in turn, both timed from process launch to exit, side by side in one run.
Also printed: the seconds from launch to the first trial's start (the study's own start time
of its earliest trial) and the machine's load, since a shared machine slows both contenders
unevenly.

The plain loop (`plain_sweep`) is what a user writes by hand: one process, torch's default
threads, a per-sample `Dataset` of the same normalised digits training images behind a
`DataLoader` (shuffle, the recipe's batch size), the same network, SGD with the recipe's
momentum, weight decay and warm-up + cosine schedule (torch's `LambdaLR`), a validation pass
after every epoch, a test pass at the end, and ``loss.item()`` each step. Nothing in it is
slowed down.

Each round runs both contenders one after the other (alternating which goes first); the ratio
is per round, and the median over rounds is printed with every round's figure.

Run: python tests/bench/bench_e2e.py [--rounds 1]   (about 2 minutes a round on a quiet
2-core machine)
"""

from __future__ import annotations

import argparse
import math
import os
import statistics
import subprocess
import sys
import tempfile
import time
from datetime import datetime
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
QUICKSTART = REPO / "sweeps" / "quickstart.toml"
TARGET = 2.0


def plain_sweep() -> None:
    """The peer, in this process: every (variant, seed) of the quickstart in turn."""
    import torch
    import torch.nn.functional as F

    from kablate.costs.catalog import build_catalog
    from kablate.data.prepare import prepare_data
    from kablate.nets.build import build_network
    from kablate.spec.loader import load_sweep

    sweep = load_sweep(QUICKSTART)
    catalog = build_catalog(sweep)
    data = prepare_data(sweep.data)
    recipe = sweep.recipe

    class Digits(torch.utils.data.Dataset):  # one sample at a time, as most loops are written
        def __init__(self, images, labels):
            self.images, self.labels = images.contiguous(), labels

        def __len__(self):
            return len(self.labels)

        def __getitem__(self, i):
            return self.images[i], int(self.labels[i])

    train = Digits(data.train.images, data.train.labels)
    val = Digits(data.val.images, data.val.labels)
    test = Digits(data.test.images, data.test.labels)
    per_epoch = math.ceil(len(train) / recipe.batch_size)
    total, warmup = recipe.epochs * per_epoch, int(round(recipe.warmup_epochs * per_epoch))

    def lr_factor(step: int) -> float:
        if step < warmup:
            return (step + 1) / warmup
        return 0.5 * (1 + math.cos(math.pi * min(1.0, (step - warmup) / max(1, total - warmup))))

    def accuracy(model, dataset) -> float:
        model.eval()
        correct = 0
        with torch.no_grad():
            for x, y in torch.utils.data.DataLoader(dataset, batch_size=512):
                correct += int((model(x).argmax(1) == y).sum())
        return correct / len(dataset)

    for seed in sweep.seeds:
        for item in catalog.variants:
            torch.manual_seed(seed)
            model = build_network(item.blueprint)
            optimizer = torch.optim.SGD(
                model.parameters(),
                lr=recipe.lr,
                momentum=recipe.momentum,
                weight_decay=recipe.weight_decay,
            )
            schedule = torch.optim.lr_scheduler.LambdaLR(optimizer, lr_factor)
            loader = torch.utils.data.DataLoader(train, batch_size=recipe.batch_size, shuffle=True)
            for _ in range(recipe.epochs):
                model.train()
                running = 0.0
                for x, y in loader:
                    optimizer.zero_grad()
                    loss = F.cross_entropy(model(x), y)
                    loss.backward()
                    optimizer.step()
                    schedule.step()
                    running += loss.item()
                val_acc = accuracy(model, val)
            test_acc = accuracy(model, test)
            print(f"{item.name} seed {seed}: val {val_acc:.3f} test {test_acc:.3f}", flush=True)


def time_plain() -> float:
    """Seconds from launching the plain loop's process to its exit."""
    env = dict(os.environ, PYTHONPATH=str(REPO / "src"))
    start = time.perf_counter()
    subprocess.run([sys.executable, __file__, "--plain"], check=True, env=env, cwd=REPO)
    return time.perf_counter() - start


def time_kablate() -> tuple[float, float]:
    """(seconds from launch to exit, seconds from launch to the first trial's start) of
    `kablate run` on the quickstart."""
    from kablate.trials.store import open_study

    env = dict(os.environ, PYTHONPATH=str(REPO / "src"))
    with tempfile.TemporaryDirectory(prefix="kablate-bench-e2e-") as tmp:
        cmd = [sys.executable, "-m", "kablate", "run", str(QUICKSTART), "--results", tmp]
        launched = datetime.now()  # naive local time, like Optuna's trial times
        start = time.perf_counter()
        subprocess.run([*cmd, "--no-report"], check=True, env=env, cwd=REPO)
        seconds = time.perf_counter() - start
        results = Path(tmp) / "quickstart"
        study = open_study("quickstart", results, None, create=False)
        first = min(t.datetime_start for t in study.get_trials() if t.datetime_start)
    return seconds, (first - launched).total_seconds()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=1)
    parser.add_argument("--plain", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.plain:
        plain_sweep()
        return
    print(f"cores: {os.cpu_count()}; load before: {Path('/proc/loadavg').read_text().strip()}")
    ratios, rows = [], []
    for i in range(args.rounds):
        if i % 2 == 0:
            ours, first = time_kablate()
            plain = time_plain()
        else:
            plain = time_plain()
            ours, first = time_kablate()
        ratios.append(plain / ours)
        rows.append((ours, plain, first))
        print(
            f"round {i + 1}: kablate run {ours:.1f} s (first trial started after {first:.1f} s), "
            f"plain loop {plain:.1f} s: {plain / ours:.2f}x; "
            f"load now: {Path('/proc/loadavg').read_text().strip()}"
        )
    median = statistics.median(ratios)
    verdict = "meets" if median >= TARGET else "misses"
    print(
        f"\nplain loop / kablate run, median of {len(ratios)} round(s): {median:.2f}x "
        f"(rounds: {', '.join(f'{r:.2f}' for r in ratios)}); {verdict} the {TARGET:.1f}x target"
    )
    print(
        "kablate run: median "
        f"{statistics.median(r[0] for r in rows):.1f} s; first trial after median "
        f"{statistics.median(r[2] for r in rows):.1f} s; plain loop: median "
        f"{statistics.median(r[1] for r in rows):.1f} s"
    )


if __name__ == "__main__":
    main()
