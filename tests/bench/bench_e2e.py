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

The floor (`floor_sweep`) is the least any runner of this work can take on this machine: two
single-thread processes (one per core) that do only the same training steps and the same
validation pass after every epoch, on batches built before the clock of each trial starts,
with the 15 trials handed out longest first (by MACs). It has no checkpoints, no storage, no
costs, no calibration and no per-image evidence. ``plain loop / floor`` is the best ratio any
runner of the same work could reach here; the issue's target is to be read against it. The
floor of the steps alone (``--steps-only``: the same, without the validation passes) is the
limit the issue quotes ("two single-thread processes of the bare training step on pre-built
batches"); it leaves out work that the plain loop and `kablate run` both do.

Each round runs the contenders one after the other (rotating which goes first); the ratios
are per round, and the median over rounds is printed with every round's figure.

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


def floor_trial(job: tuple[int, int, bool]) -> float:
    """In a floor process: one trial's training steps and, with ``validate``, its per-epoch
    validation, on pre-built batches; its seconds."""
    import torch
    import torch.nn.functional as F

    from kablate.train.loop import make_optimizer, set_lr, step_count

    torch.set_num_threads(1)
    seed, index, validate = job
    sweep, catalog, data = FLOOR_STATE
    recipe = sweep.recipe
    steps = step_count(recipe, len(data.train.labels))
    cl = torch.channels_last
    batches = []  # every epoch's batches, built before the clock starts
    for epoch in range(recipe.epochs):
        order = torch.randperm(
            len(data.train.labels), generator=torch.Generator().manual_seed(epoch)
        )
        for start in range(0, len(order), recipe.batch_size):
            idx = order[start : start + recipe.batch_size]
            batches.append(
                (data.train.images[idx].contiguous(memory_format=cl), data.train.labels[idx])
            )
    val = [
        (data.val.images[i : i + 512].contiguous(memory_format=cl), data.val.labels[i : i + 512])
        for i in range(0, len(data.val.labels), 512)
    ]
    start = time.perf_counter()
    torch.manual_seed(seed)
    model = build_network_cl(catalog.variants[index].blueprint)
    optimizer = make_optimizer(model, recipe)
    curve = []  # validation accuracy per epoch, as every contender keeps
    for epoch in range(recipe.epochs):
        model.train()
        for step in range(epoch * steps.per_epoch, (epoch + 1) * steps.per_epoch):
            x, y = batches[step]
            set_lr(optimizer, recipe, step, steps)
            loss = F.cross_entropy(model(x), y)
            optimizer.zero_grad(set_to_none=True)
            loss.backward()
            optimizer.step()
        if not validate:
            continue
        model.eval()
        with torch.no_grad():
            correct = sum(int((model(x).argmax(1) == y).sum()) for x, y in val)
        curve.append(correct / len(data.val.labels))
    return time.perf_counter() - start


def build_network_cl(blueprint):
    import torch

    from kablate.nets.build import build_network

    return build_network(blueprint).to(memory_format=torch.channels_last)


FLOOR_STATE = None


def floor_init() -> None:
    """Each floor process: the sweep, its variants and its data, once."""
    global FLOOR_STATE
    from kablate.costs.catalog import build_catalog
    from kablate.data.prepare import prepare_data
    from kablate.spec.loader import load_sweep

    sweep = load_sweep(QUICKSTART)
    FLOOR_STATE = (sweep, build_catalog(sweep), prepare_data(sweep.data))


def floor_sweep(validate: bool) -> None:
    """The floor, in this process: two single-thread processes share the 15 trials, handed out
    longest first (by MACs)."""
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    from kablate.costs.catalog import build_catalog
    from kablate.spec.loader import load_sweep

    sweep = load_sweep(QUICKSTART)
    catalog = build_catalog(sweep)
    by_macs = sorted(range(len(catalog.variants)), key=lambda i: -catalog.variants[i].cost.macs)
    jobs = [(seed, i, validate) for seed in sweep.seeds for i in by_macs]
    context = mp.get_context("spawn")
    with ProcessPoolExecutor(2, mp_context=context, initializer=floor_init) as pool:
        seconds = list(pool.map(floor_trial, jobs, chunksize=1))
    print(f"floor: {len(seconds)} trials, {sum(seconds):.1f} s of training in all", flush=True)


def time_floor(validate: bool = True) -> float:
    """Seconds from launching the floor's process to its exit."""
    env = dict(os.environ, PYTHONPATH=str(REPO / "src"))
    start = time.perf_counter()
    flag = "--floor" if validate else "--steps-only"
    subprocess.run([sys.executable, __file__, flag], check=True, env=env, cwd=REPO)
    return time.perf_counter() - start


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
    parser.add_argument("--floor", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--steps-only", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.plain:
        plain_sweep()
        return
    if args.floor or args.steps_only:
        floor_sweep(validate=args.floor)
        return
    print(f"cores: {os.cpu_count()}; load before: {Path('/proc/loadavg').read_text().strip()}")
    rows = []
    contenders = ["kablate", "plain", "floor", "steps"]
    for i in range(args.rounds):
        timed = {}
        k = i % len(contenders)
        for name in contenders[k:] + contenders[:k]:  # rotate who goes first
            if name == "kablate":
                timed["kablate"], timed["first"] = time_kablate()
            elif name == "plain":
                timed["plain"] = time_plain()
            else:
                timed[name] = time_floor(validate=name == "floor")
        rows.append(timed)
        print(
            f"round {i + 1}: kablate run {timed['kablate']:.1f} s (first trial started after "
            f"{timed['first']:.1f} s), plain loop {timed['plain']:.1f} s, floor "
            f"{timed['floor']:.1f} s, steps alone {timed['steps']:.1f} s; plain / kablate "
            f"{timed['plain'] / timed['kablate']:.2f}x, plain / floor "
            f"{timed['plain'] / timed['floor']:.2f}x, plain / steps alone "
            f"{timed['plain'] / timed['steps']:.2f}x; "
            f"load now: {Path('/proc/loadavg').read_text().strip()}"
        )
    ours = [r["plain"] / r["kablate"] for r in rows]
    best = [r["plain"] / r["floor"] for r in rows]
    bare = [r["plain"] / r["steps"] for r in rows]
    median = statistics.median(ours)
    verdict = "meets" if median >= TARGET else "misses"
    print(
        f"\nplain loop / kablate run, median of {len(rows)} round(s): {median:.2f}x "
        f"(rounds: {', '.join(f'{r:.2f}' for r in ours)}); {verdict} the {TARGET:.1f}x target"
    )
    print(
        f"plain loop / floor (the best any runner could reach here), median: "
        f"{statistics.median(best):.2f}x (rounds: {', '.join(f'{r:.2f}' for r in best)})"
    )
    print(
        f"plain loop / the training steps alone, without the validation passes, median: "
        f"{statistics.median(bare):.2f}x (rounds: {', '.join(f'{r:.2f}' for r in bare)})"
    )
    print(
        f"kablate run / floor, median: "
        f"{statistics.median(r['kablate'] / r['floor'] for r in rows):.2f}"
    )
    print(
        "medians: kablate run "
        f"{statistics.median(r['kablate'] for r in rows):.1f} s, first trial after "
        f"{statistics.median(r['first'] for r in rows):.1f} s; plain loop "
        f"{statistics.median(r['plain'] for r in rows):.1f} s; floor "
        f"{statistics.median(r['floor'] for r in rows):.1f} s; steps alone "
        f"{statistics.median(r['steps'] for r in rows):.1f} s"
    )


if __name__ == "__main__":
    main()
