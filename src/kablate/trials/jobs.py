"""Jobs: the (variant, seed) pairs of a sweep, in the order they should run.

Every variant gets seed 0 before any variant gets seed 1, and so on, so a run that is cut
short still holds a complete comparison at fewer seeds.
"""

from __future__ import annotations

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
