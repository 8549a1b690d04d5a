"""Progress of a sweep, read from its storage: safe while a run is going, from anywhere."""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field


@dataclass
class SweepStatus:
    name: str
    counts: dict[str, int]
    per_variant: dict[str, dict[str, int]]
    n_jobs: int
    done_seconds: float  # summed train seconds of finished trials
    throughput_per_hour: float  # finished trials per hour of wall time, all workers together
    eta_seconds: float | None
    workers: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        return self.__dict__.copy()


STATES = ("done", "running", "waiting", "failed", "diverged", "missing")


def summarize(name: str, rows: list[dict], first_start: float | None, now: float) -> SweepStatus:
    """Counts, per-variant progress, throughput and ETA from trials.csv-style rows."""
    counts = Counter(row["status"] for row in rows)
    per_variant: dict[str, dict[str, int]] = {}
    for row in rows:
        entry = per_variant.setdefault(row["variant"], {s: 0 for s in STATES})
        entry[row["status"]] += 1
    finished = [r for r in rows if r["status"] in ("done", "diverged")]
    done_seconds = sum(float(r["train_seconds"] or 0) for r in finished)
    left = sum(counts[s] for s in ("running", "waiting", "failed", "missing"))
    throughput, eta = 0.0, None
    if finished and first_start:
        elapsed = max(1.0, now - first_start)
        throughput = len(finished) / elapsed * 3600
        eta = left / (len(finished) / elapsed) if left else 0.0
    workers = sorted({r["worker"] for r in rows if r["status"] == "running" and r["worker"]})
    return SweepStatus(
        name,
        {s: counts.get(s, 0) for s in STATES},
        per_variant,
        len(rows),
        done_seconds,
        throughput,
        eta,
        workers,
    )


def format_status(status: SweepStatus) -> str:
    c = status.counts
    lines = [
        f"sweep {status.name}: {c['done']}/{status.n_jobs} done, {c['running']} running, "
        f"{c['waiting'] + c['missing']} waiting, {c['failed']} failed, {c['diverged']} diverged",
    ]
    if status.throughput_per_hour:
        eta = "finished" if not status.eta_seconds else _duration(status.eta_seconds)
        lines.append(f"throughput {status.throughput_per_hour:.1f} trials/h   ETA {eta}")
    if status.workers:
        lines.append("running on: " + ", ".join(status.workers))
    width = max(len(v) for v in status.per_variant) if status.per_variant else 8
    lines.append("")
    for variant, entry in status.per_variant.items():
        total = sum(entry.values())
        bar = (
            "#" * entry["done"]
            + "~" * entry["running"]
            + "x" * (entry["failed"] + entry["diverged"])
            + "." * (entry["waiting"] + entry["missing"])
        )
        lines.append(f"  {variant:<{width}}  [{bar}]  {entry['done']}/{total}")
    lines.append("")
    lines.append("  # done  ~ running  x failed or diverged  . waiting")
    return "\n".join(lines)


def _duration(seconds: float) -> str:
    seconds = int(seconds)
    h, rem = divmod(seconds, 3600)
    m, s = divmod(rem, 60)
    return f"{h}h{m:02d}m" if h else f"{m}m{s:02d}s"
