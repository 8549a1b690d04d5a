"""Jobs: the (variant, seed) pairs of a sweep, in the order they should run.

Every variant gets seed 0 before any variant gets seed 1, and so on, so a run that is cut
short still holds a complete comparison at fewer seeds. Within a seed round the longest trials
go first (`longest_first`), so that no worker idles at the round's end while another trains
the slowest variant.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from kablate.lifecycle import JobKey


@dataclass(frozen=True)
class Job:
    variant_id: str
    variant: str
    seed: int

    @property
    def key(self) -> str:
        """Stable across reruns; names the trial's artifact folder."""
        return str(JobKey(self.variant_id, self.seed))

    @classmethod
    def from_attrs(cls, attrs: dict) -> Job:
        """The job a trial was enqueued for, from its user attributes (`attrs`)."""
        return cls(attrs["variant_id"], attrs["variant"], int(attrs["seed"]))

    def attrs(self) -> dict:
        return {
            "job": self.key,
            "variant": self.variant,
            "variant_id": self.variant_id,
            "seed": self.seed,
        }


def order_jobs(variants: list[tuple[str, str]], seeds: tuple[int, ...]) -> list[Job]:
    """Seed-major order over ``(variant_id, name)`` pairs."""
    return [Job(vid, name, seed) for seed in seeds for vid, name in variants]


def sweep_jobs(catalog) -> list[Job]:
    """The jobs of a costed sweep (a `Catalog`), seed-major."""
    return order_jobs([(v.variant.id, v.name) for v in catalog.variants], catalog.sweep.seeds)


def longest_first(jobs: list[Job], seconds: Mapping[str, float]) -> list[Job]:
    """``jobs`` with each seed round ordered by predicted trial seconds, longest first.

    The rounds keep their order, and so do jobs of equal time; a variant without a prediction
    counts as 0 s (last in its round). This is Graham's
    longest-processing-time-first list scheduling (Graham 1969, "Bounds on multiprocessing
    timing anomalies"): a round of n jobs on m workers then ends within (4/3 − 1/(3m)) of the
    shortest possible time, where the plan's order can leave one worker training the slowest
    variant alone while the others idle.

    Args:
        seconds: variant id → predicted trial seconds (the calibration, `budget.calibrate`).
    """
    rounds = {seed: i for i, seed in enumerate(dict.fromkeys(j.seed for j in jobs))}
    return sorted(jobs, key=lambda j: (rounds[j.seed], -seconds.get(j.variant_id, 0.0)))


def claim_order(jobs: list[Job], seconds: Mapping[str, float]) -> dict[str, int]:
    """Job key → its position in the order the workers claim jobs (`queue.claim_next`)."""
    return {job.key: i for i, job in enumerate(longest_first(jobs, seconds))}
