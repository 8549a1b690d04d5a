"""Sweep files and configs: load, validate, resolve includes."""

from kablate.spec.loader import load_sweep, sweep_from_dict
from kablate.spec.schema import (
    AugmentSpec,
    DataSpec,
    FilterSpec,
    NetworkSpec,
    PlanSpec,
    RecipeSpec,
    StageSpec,
    StemSpec,
    SweepSpec,
)

__all__ = [
    "AugmentSpec",
    "DataSpec",
    "FilterSpec",
    "NetworkSpec",
    "PlanSpec",
    "RecipeSpec",
    "StageSpec",
    "StemSpec",
    "SweepSpec",
    "load_sweep",
    "sweep_from_dict",
]
