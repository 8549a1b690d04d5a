"""Benchmark: racing over seeds against the full sweep, side by side in one run.

Targets (issue: racing over seeds, and search when the plan space is too big for a grid):
- the training seconds spent to reach the decision with racing, against training every
  trial: ≤ 0.5×;
- the recommended plan with racing is the full sweep's, or one that the full sweep's decision
  rule also accepts: for the margin rule, a plan in the full sweep's qualifying set (cheaper
  than the baseline and non-inferior by its lower bound), computed from the full sweep's own
  analysis (`analysis.decide`), not by eye.
- printed beside them: how many of the race's retirements the same test, in the same Holm
  family, also makes on the full sweep's evidence (every seed of every variant); a retirement
  is a test at the 5% family-wise level, not a certainty.

Both runs train the same sweep file (default: sweeps/scarce-labels.toml, 12 variants × 3 seeds
on digits) into fresh results folders, at the default staffing (workers x threads), one
after the other; only ``[sweep] racing`` differs ("on" against "off"). Training seconds are
each trial's ``trial_seconds`` (the whole `train_trial` call) summed over the finished trials.
The machine is shared, so the load moves the seconds of one run against the other's; a
second ratio takes each trial's time from the full run's mean for its variant, which the load
cannot tilt, and the load average (1 min, sampled every 5 s) is printed beside both.
With ``--halving`` the racing run also stops trials early by successive halving
(``[halving] enabled = true``, its default rungs): its training seconds then include the
stopped trials' (each stopped trial's ``trial_seconds`` up to its stop), and a variant stopped
on a seed gets no more seeds.
Run: python tests/bench/bench_race.py [--halving] [sweeps/scarce-labels.toml]
(about 6 minutes at load 7 on 2 cores: 2 min racing, 4 min without)
"""

from __future__ import annotations

import argparse
import re
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter, defaultdict
from pathlib import Path

from optuna.trial import TrialState

from kablate.analysis.race import compare_pairs
from kablate.analysis.summary import analyze, pick_settings
from kablate.spec.costs import COSTS
from kablate.trials import open_results

REPO = Path(__file__).resolve().parents[2]


class LoadSampler:
    """The 1-minute load average from /proc/loadavg, sampled every few seconds."""

    def __init__(self, every: float = 5.0) -> None:
        self.samples: list[float] = []
        self.every, self.stop = every, threading.Event()
        self.thread = threading.Thread(target=self.loop, daemon=True)

    def loop(self) -> None:
        while not self.stop.is_set():
            self.samples.append(float(Path("/proc/loadavg").read_text().split()[0]))
            self.stop.wait(self.every)

    def __enter__(self) -> LoadSampler:
        self.thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self.stop.set()
        self.thread.join()

    def text(self) -> str:
        s = self.samples or [float("nan")]
        return f"load {statistics.mean(s):.1f} (min {min(s):.1f}, max {max(s):.1f})"


def with_racing(sweep: Path, racing: str, folder: Path, halving: bool = False) -> Path:
    """A copy of ``sweep`` whose ``[sweep]`` table says ``racing = "<racing>"``, with a
    ``[halving]`` table that enables it when ``halving``."""
    text = re.sub(r"(?m)^\s*racing\s*=.*\n", "", sweep.read_text())
    text, n = re.subn(r"(?m)^\[sweep\]\s*$", f'[sweep]\nracing = "{racing}"', text, count=1)
    if n != 1:
        raise SystemExit(f"{sweep} has no [sweep] table")
    if halving:
        if re.search(r"(?m)^\[halving\]", text):
            raise SystemExit(f"{sweep} has its own [halving] table: benchmark it as it is")
        text += "\n[halving]\nenabled = true\n"
    path = folder / f"{racing}-{sweep.name}"
    path.write_text(text)
    return path


def run(sweep: Path, racing: str, root: Path, halving: bool = False) -> dict:
    """Train ``sweep`` with racing on or off (and halving) into ``root``; its trials and its
    decision."""
    root.mkdir(parents=True)
    copy = with_racing(sweep, racing, root, halving)
    with LoadSampler() as load:
        start = time.perf_counter()
        out = subprocess.run(
            [sys.executable, "-m", "kablate", "run", str(copy), "--results", str(root),
             "--no-report"],
            cwd=REPO, capture_output=True, text=True,
        )  # fmt: skip
        wall = time.perf_counter() - start
    if out.returncode != 0:
        raise SystemExit(f"kablate run ({racing}) ended with {out.returncode}:\n{out.stderr}")
    return read_run(next(p for p in root.iterdir() if p.is_dir()), wall, load.text())


def read_run(path: Path, wall: float, load: str) -> dict:
    """A finished run's trial seconds, statuses and decision, from its results folder."""
    folder = open_results(path)
    # A stopped trial (halving) spent its seconds too, up to its stop.
    done = [
        t for t in folder.study.get_trials() if t.state in (TrialState.COMPLETE, TrialState.PRUNED)
    ]
    rows, curves = folder.rows()
    data = folder.data()
    analysis = analyze(rows, curves, folder.plan, folder.meta.get("grids", []), data,
                       pick_settings(folder.meta))  # fmt: skip
    analysis.race = folder.race()  # as the report reads it (report/compose.py)
    seconds = defaultdict(list)
    for t in done:
        seconds[t.user_attrs["variant"]].append(t.user_attrs["trial_seconds"])
    statuses = Counter(r["status"] for r in rows)
    return {
        "wall": wall,
        "load": load,
        "seconds": seconds,
        "total": sum(sum(s) for s in seconds.values()),
        "statuses": statuses,
        "decision": analysis.decision,
        "variants": analysis.variants,
        "analysis": analysis,
    }


def retired_lines(variants) -> list[str]:
    out = []
    for _, row in variants[variants["retired_after"].notna()].iterrows():
        out.append(
            f"  {row['variant']}: after seed {row['retired_after']}, {row['retired_why']}, "
            f"against {row['retired_by']} "
            f"(diff {100 * row['retired_diff']:+.2f} pp, upper bound "
            f"{100 * row['retired_bound']:+.2f} pp, p_holm {row['retired_p_holm']:.4f})"
        )
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("sweep", nargs="?", default="sweeps/scarce-labels.toml")
    parser.add_argument("--halving", action="store_true", help="the racing run also halves")
    args = parser.parse_args()
    sweep = Path(args.sweep).resolve()
    with tempfile.TemporaryDirectory() as tmp:
        race = run(sweep, "on", Path(tmp) / "race", args.halving)
        full = run(sweep, "off", Path(tmp) / "full")
    compare(sweep, race, full)


def compare(sweep: Path, race: dict, full: dict) -> None:
    """Print the figures of the two runs side by side."""
    n_full = sum(len(s) for s in full["seconds"].values())
    n_race = sum(len(s) for s in race["seconds"].values())
    mean = {v: statistics.mean(s) for v, s in full["seconds"].items()}
    # Each of the race's trials at the full run's mean time for its variant: load cannot tilt it.
    steady = sum(mean[v] * len(s) for v, s in race["seconds"].items()) / full["total"]
    print(f"sweep {sweep.name}: {len(mean)} variants, {n_full} trials without racing")
    print(
        f"training seconds to the decision: racing {race['total']:.0f}s ({race['load']}) vs "
        f"full {full['total']:.0f}s ({full['load']}): {race['total'] / full['total']:.2f}x   "
        f"(target <= 0.5x)"
    )
    print(
        f"  the same with each trial at the full run's mean time for its variant: {steady:.2f}x; "
        f"whole command {race['wall']:.0f}s vs {full['wall']:.0f}s"
    )
    print(
        f"trials: {n_race} trained with racing ({race['statuses'].get('stopped', 0)} of them "
        f"stopped early by halving), {n_full - n_race} skipped "
        f"(statuses {dict(race['statuses'])})"
    )
    print("retired:")
    print("\n".join(retired_lines(race["variants"])) or "  none")
    theirs, ours = full["decision"], race["decision"]
    accepted = ours.recommended == theirs.recommended or ours.recommended in theirs.qualifying
    print(
        f"recommended: racing {ours.recommended}, full {theirs.recommended} (full sweep's "
        f"qualifying plans: {', '.join(theirs.qualifying) or 'none'}); the racing pick is "
        f"{'the same' if ours.recommended == theirs.recommended else 'different'}, and the full "
        f"sweep's rule {'accepts' if accepted else 'does NOT accept'} it"
    )
    print(confirmed_line(race["analysis"], full["analysis"]))
    n_seeds = max(len(s) for s in full["seconds"].values())
    # The variants that trained every seed: neither retired by racing nor stopped by halving.
    kept = [v for v, spent in race["seconds"].items() if len(spent) == n_seeds]
    kept_share = sum(sum(full["seconds"].get(v, [])) for v in kept) / full["total"]
    print(
        f"the variants that trained every seed take {kept_share:.0%} of the full sweep's "
        f"training seconds: with every other variant out after the first seed round and every "
        f"trial at full length, racing "
        f"spends at least "
        f"(1 + {n_seeds - 1} x {kept_share:.2f}) / {n_seeds} = "
        f"{(1 + (n_seeds - 1) * kept_share) / n_seeds:.2f}x"
    )
    table = full["variants"].set_index("variant")[theirs.cost]
    costlier = table.index[table > table[theirs.baseline]]
    print(
        f"{len(costlier)} variants cost more {theirs.cost} than the baseline {theirs.baseline}: "
        f"the margin rule never recommends them, and racing retires one when it loses more "
        f"than the margin to a variant that costs no more or (futility, under the margin rule) "
        f"is shown to gain less than the margin over the baseline; they take "
        f"{sum(sum(full['seconds'].get(v, [])) for v in costlier) / full['total']:.0%} of the "
        f"full sweep's training seconds"
    )


def confirmed_line(raced, full) -> str:
    """How many of the race's retirements (each on the seeds up to its round) the same test,
    in the same Holm family of every variant, also makes on the full sweep's evidence (every
    seed of every variant)."""
    rule = raced.race["rule"] if raced.race else None
    retired = raced.variants[raced.variants["retired_after"].notna()]
    if rule is None or full.evidence is None or not len(retired):
        return "retirements confirmed on the full sweep's evidence: none to confirm"
    column = COSTS[rule["cost"]].column
    costs = full.variants.set_index("variant")[column].astype(float).to_dict()
    tested = compare_pairs(
        full.evidence, costs, full.baseline, rule["margin_pp"] / 100,
        futility=bool(rule.get("futility")),
    )  # fmt: skip
    again = {(d.name, d.by, d.why) for d in tested if d.retires}
    confirmed = [
        r.variant for r in retired.itertuples() if (r.variant, r.retired_by, r.retired_why) in again
    ]
    return (
        f"retirements confirmed on the full sweep's evidence (the same test, all "
        f"{len(full.evidence.seeds)} seeds): {len(confirmed)} of {len(retired)}"
        + (f"; not: {', '.join(sorted(set(retired['variant']) - set(confirmed)))}"
           if len(confirmed) < len(retired) else "")
    )  # fmt: skip


if __name__ == "__main__":
    main()
